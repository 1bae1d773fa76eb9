"""Planning an analysis: the design file read, every table checked, every design matrix and
contrast built (:func:`plan_analysis`) before any EEG data beyond the array headers is read, so
every input error surfaces before any fitting."""

from __future__ import annotations

import logging
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from ..errors import ModelError, StudyError
from ..formula import ContrastMatrix, Design, DesignMatrix, build_design, contrast_matrix, design_matrix
from ..inference.corrections import PERMUTATION_METHODS, Correction, correction_from_name
from ..spec import DesignSpec, TestSpec, load_design
from ..study import Study, read_study

if TYPE_CHECKING:  # pragma: no cover
    from ..inference.graph import PointGraph
    from ..sensors.neighbours import SensorGraph

log = logging.getLogger("glmeeg")


@dataclass(frozen=True)
class TestPlan:
    """One test, ready to run: its contrasts and its group design over the included subjects."""

    spec: TestSpec
    subject_contrast: ContrastMatrix
    group_formula: str
    group_design: Design
    group_matrix: DesignMatrix
    subjects: tuple[str, ...]
    group_contrast: ContrastMatrix
    notes: tuple[str, ...]
    correction: Correction
    resampling: str | None = None


@dataclass(frozen=True)
class AnalysisPlan:
    """Everything :func:`run_analysis` will do, checked, before any EEG data are read."""

    design_file: Path | None
    spec: DesignSpec
    study: Study
    subject_design: Design
    subject_matrices: dict[str, DesignMatrix]
    tests: tuple[TestPlan, ...]
    warnings: tuple[str, ...]
    # The sensors' neighbours and the graph of points, for cluster and TFCE corrections.
    sensor_graph: SensorGraph | None = None
    graph: PointGraph | None = None
    # Input files beyond the study's (the neighbour table), for the provenance.
    extra_inputs: dict[str, Path] = field(default_factory=dict)

    def describe(self) -> str:
        """What will be done, as readable text (``glmeeg check``)."""
        st = self.study
        lines = [f"{len(st.subject_ids)} subjects; points: {' x '.join(map(str, st.axes.shape))} "
                 f"({', '.join(st.axes.dims)}) = {st.axes.n_points}; times "
                 f"{st.axes.times[0]:g} to {st.axes.times[-1]:g} s",
                 f"subject model: {self.subject_design.formula}",
                 f"  columns ({len(self.subject_design.column_names)}, full rank): "
                 f"{', '.join(self.subject_design.column_names)}"]
        for v, lv in self.subject_design.factors.items():
            lines.append(f"  factor {v}: levels {', '.join(lv)} (reference {lv[0]})")
        lines.append("  subject   epochs  trials  used  dropped  df   condition")
        for s, X in self.subject_matrices.items():
            rows = st.subject_trials(s)
            lines.append(f"  {s:<9} {st.epoch_counts[s]:>6}  {len(rows):>6}  {X.matrix.shape[0]:>4}  "
                         f"{X.n_dropped:>7}  {X.matrix.shape[0] - X.matrix.shape[1]:>3}  "
                         f"{X.condition_number:9.3g}")
        for t in self.tests:
            kind = "t" if t.subject_contrast.n_rows == 1 and t.group_contrast.n_rows == 1 else "F"
            lines.append(f"test {t.spec.name}: {kind} test, {len(t.subjects)} subjects, "
                         f"{t.correction.describe()}, alpha {t.spec.alpha:g}, "
                         f"{t.spec.alternative}" + (f"; resampling: {t.resampling}" if t.resampling else ""))
            for lab, row in zip(t.subject_contrast.labels, t.subject_contrast.matrix):
                lines.append(f"  subject contrast {lab}: {_weights(self.subject_design.column_names, row)}")
            lines.append(f"  group model: {t.group_formula}; columns {', '.join(t.group_design.column_names)}")
            for lab, row in zip(t.group_contrast.labels, t.group_contrast.matrix):
                lines.append(f"  group contrast {lab}: {_weights(t.group_design.column_names, row)}")
            lines += [f"  note: {n}" for n in t.notes]
        if self.sensor_graph is not None:
            sg = self.sensor_graph
            lines.append(f"neighbours: {sg.method}; {len(sg.edges)} sensor pairs, "
                         f"{self.graph[1].size // 2} point pairs")
        lines += [f"warning: {w}" for w in self.warnings]
        return "\n".join(lines)


def correction_of(test: TestSpec) -> Correction:
    """The settings object of a test's correction (:mod:`glmeeg.inference.corrections`), from the
    design file's ``correction`` and its keys."""
    given = {"permutations": test.permutations, "seed": test.seed, "resampling": test.resampling,
             "threshold": test.cluster_threshold, "statistic": test.cluster_statistic,
             "extent_exponent": test.tfce_extent_exponent, "height_exponent": test.tfce_height_exponent}
    if test.correction not in PERMUTATION_METHODS:
        return correction_from_name(test.correction)  # the seed may belong to the bootstrap
    return correction_from_name(test.correction, **{k: v for k, v in given.items() if v is not None})


def _weights(names, row) -> str:
    return ", ".join(f"{w:g}*{n}" for n, w in zip(names, row) if w != 0)


def plan_analysis(design: str | Path | DesignSpec, *, root: str | Path | None = None) -> AnalysisPlan:
    """Read a design and its study and build every design matrix and contrast.

    Parameters
    ----------
    design : str, Path or DesignSpec
        A design file, or an already validated design (then ``root`` is required).
    root : str or Path, optional
        Folder the study paths are relative to; default: the design file's folder.

    Raises
    ------
    GlmeegError
        Any problem with the design, the study files, the formulas or the contrasts.
    """
    if isinstance(design, DesignSpec):
        spec, design_file = design, None
        if root is None:
            raise ValueError("root is needed when the design is given as a DesignSpec")
    else:
        design_file = Path(os.path.abspath(design))
        spec = load_design(design_file)
        root = design_file.parent if root is None else root
    study = read_study(spec.data, root=root)
    warnings = list(study.warnings)
    sdesign = build_design(study.trials, spec.subject_model.formula, levels=spec.subject_model.levels,
                           source=spec.data.trials, where="subject_model.formula")
    if spec.subject_model.trial_weights is not None and spec.subject_model.trial_weights not in study.trials.columns:
        raise StudyError(f"subject_model.trial_weights: {spec.subject_model.trial_weights!r} is not a "
                         f"column of {spec.data.trials}")
    matrices = {s: design_matrix(sdesign, study.subject_trials(s), who=f"subject {s}")
                for s in study.subject_ids}
    for s, X in matrices.items():
        if X.condition_number > 1e8:
            warnings.append(f"subject {s}: design condition number {X.condition_number:.3g}; estimates "
                            "may be unstable (rescale or centre covariates)")
    tests = [_plan_test(t, spec, study, sdesign, warnings) for t in spec.test]
    sgraph, graph, extra = None, None, {}
    needs = {t.spec.correction for t in tests} & set(PERMUTATION_METHODS)
    if needs:
        sgraph, graph, extra = _neighbour_graph(spec, study, root, required=bool(needs - {"max-statistic"}),
                                                warnings=warnings)
    return AnalysisPlan(design_file=design_file, spec=spec, study=study, subject_design=sdesign,
                        subject_matrices=matrices, tests=tuple(tests), warnings=tuple(warnings),
                        sensor_graph=sgraph, graph=graph, extra_inputs=extra)


def _plan_test(t: TestSpec, spec: DesignSpec, study: Study, sdesign: Design, warnings: list) -> TestPlan:
    """One test's contrasts, group design and resampling scheme, every error named with the test."""
    where = f"test {t.name!r}"
    sc = contrast_matrix(sdesign, t.subject_contrast, where=f"{where}: subject_contrast")
    gformula = t.group_formula or spec.group_model.formula
    gsource = spec.data.subjects or "the subjects (no subjects table)"
    gdesign = build_design(study.subjects, gformula, levels=spec.group_model.levels, source=gsource,
                           where=f"{where}: group formula")
    gm = design_matrix(gdesign, study.subjects, who=f"{where}: group design")
    included = tuple(np.asarray(study.subject_ids)[gm.kept])
    gc = contrast_matrix(gdesign, t.group_contrast, where=f"{where}: group_contrast")
    notes = []
    if gm.condition_number > 1e8:
        warnings.append(f"{where}: group design condition number {gm.condition_number:.3g}; "
                        "estimates may be unstable (rescale or centre covariates such as age)")
    if gm.n_dropped:
        notes.append(f"{gm.n_dropped} subject(s) left out for missing values in {gformula}: "
                     f"{', '.join(np.asarray(study.subject_ids)[~gm.kept])}")
    n, q = gm.matrix.shape
    k, m = sc.n_rows, gc.n_rows
    if k > 1 and m > 1:
        raise ModelError(f"{where}: a joint test over {k} subject contrasts takes one group "
                         f"contrast; got {m}")
    needed = q + k if k > 1 else q + 1
    if n < needed:
        raise ModelError(f"{where}: {n} subjects for a group model with {q} column(s)"
                         f"{f' and {k} joint subject contrasts' if k > 1 else ''}; at least "
                         f"{needed} are needed")
    if (k > 1 or m > 1) and t.alternative != "two-sided":
        raise ModelError(f"{where}: alternative {t.alternative!r} applies to t tests only; this "
                         "is an F test (use two-sided)")
    if t.bootstrap:
        from ..group_level.robust import group_layout
        if k > 1:
            raise ModelError(f"{where}: bootstrap intervals take one subject contrast")
        try:
            group_layout(gm.matrix, gc.matrix, method="bootstrap")
        except ModelError as e:
            raise ModelError(f"{where}: {e}") from None
    if t.group_method != "glm":
        from ..group_level.robust import group_layout
        if k > 1:
            raise ModelError(f"{where}: group_method {t.group_method!r} takes one subject contrast")
        try:
            group_layout(gm.matrix, gc.matrix, method=t.group_method)
        except ModelError as e:
            raise ModelError(f"{where}: {e}") from None
    scheme = None
    if t.correction in PERMUTATION_METHODS:
        from ..inference.permutation import choose_resampling
        try:
            scheme = choose_resampling(gm.matrix, gc.matrix, requested=t.resampling or "auto")
        except ModelError as e:
            raise ModelError(f"{where}: {e}") from None
    if n < 16:
        notes.append(f"{n} subjects: fewer than the 16-32 common in EEG group studies "
                     "(common practice); estimates and power may be poor")
    return TestPlan(spec=t, subject_contrast=sc, group_formula=gformula, group_design=gdesign,
                          group_matrix=gm, subjects=included, group_contrast=gc, notes=tuple(notes),
                          correction=correction_of(t), resampling=scheme)


def _neighbour_graph(spec: DesignSpec, study: Study, root, *, required: bool,
                     warnings: list) -> tuple[SensorGraph | None, PointGraph | None, dict[str, Path]]:
    """Sensor neighbours and the graph of points, for cluster and TFCE corrections."""
    from ..errors import GlmeegError
    from ..inference.graph import map_graph
    from ..sensors.neighbours import sensor_graph
    from ..study import read_neighbour_table

    table, extra = None, {}
    if spec.data.neighbours is not None:
        path = Path(root) / spec.data.neighbours
        table = read_neighbour_table(path, label=spec.data.neighbours)
        extra["neighbours"] = path
    try:
        sg = sensor_graph(study.sensors, neighbour_table=table, neighbour_label=spec.data.neighbours or "",
                          sensors_label=spec.data.channels)
    except GlmeegError:
        if required:
            raise
        warnings.append("no sensor neighbours (no positions or neighbour table): significant "
                        "points are not grouped into regions")
        return None, None, extra
    if sg.isolated:
        warnings.append(f"{len(sg.isolated)} sensor(s) have no neighbours and form clusters on their "
                        f"own: {', '.join(sg.isolated)}")
    return sg, map_graph(sg.adjacency(), study.axes.shape), extra
