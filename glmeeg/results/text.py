"""The plain-text description of a result and the cautions shown wherever results are."""

from __future__ import annotations

from typing import TYPE_CHECKING

from ..group_level.assumptions import normality_not_tested
from ..group_level.effect_sizes import size_label
from .findings import CLUSTER_CAUTION

if TYPE_CHECKING:
    from .models import TestResult


CLINICAL_CAUTION = ("glmeeg is research software, not a clinical diagnostic device: clinical EEG "
                    "interpretation belongs to licensed clinicians under local regulations.")


CAUTION = ("Significant points are where the test rejects the null hypothesis under the chosen "
           "error control; they do not establish the exact onset, offset or spatial extent of an "
           "effect.")


def describe(result: TestResult) -> str:
    f = result.findings()
    df = f"t({result.df[1]:g})" if result.kind == "t" else f"F({result.df[0]:g}, {result.df[1]:g})"
    method = {"trimmed": f", {100 * result.spec.trim_used:g} % trimmed means",
              "welch": ", Welch's unequal variances"}.get(result.spec.group_method, "")
    lines = [f"test {result.name}: {df}{method}, {result.n_subjects} subjects, {result.correction.describe()}, "
             f"alpha {result.alpha:g}, {result.alternative}",
             f"  {f['n_significant']} of {f['n_points']} points significant"]
    if "peak" in f:
        pk = f["peak"]
        where = ", ".join(f"{k} {pk[k]:g}" if k != "channel" else f"channel {pk[k]}"
                          for k in ("channel", "frequency", "time") if k in pk)
        lines.append(f"  peak: {where}: {result.kind} = {pk['statistic']:.3f}, p = {pk['p']:.3g}, "
                     f"corrected p = {pk['p_corrected']:.3g}, {result.effect_size_name} = {pk['effect_size']:.3f}"
                     + (f" [{100 * result.confidence_level:g} % CI {pk['effect_size_interval'][0]:.3f}, "
                        f"{pk['effect_size_interval'][1]:.3f}]" if pk.get("effect_size_interval") else "")
                     + (f" ({size_label(pk['effect_size'])})" if result.kind == "t" else ""))
    for ch in f["channels"][:40]:
        lines.append(f"    {ch['channel']:>8}: {1000 * ch['first_time']:7.0f} to "
                     f"{1000 * ch['last_time']:5.0f} ms ({ch['n_points']} points)")
    if len(f["channels"]) > 40:
        lines.append(f"    ... and {len(f['channels']) - 40} more channels")
    if result.resampling is not None:
        r = result.resampling
        lines.append(f"  {r.scheme}: {r.n_resamplings} resamplings"
                     f"{' (all possible)' if r.exhaustive else f', seed {r.seed}'}"
                     + (f", cluster-forming threshold {r.cluster_threshold:.3f}"
                        if r.cluster_threshold is not None else ""))
        sig = [c for c in result.clusters if c.significant]
        what = "clusters" if result.correction.method == "cluster" else "regions of significant points"
        lines.append(f"  {len(sig)} significant {what}" + (":" if sig else ""))
        for c in sig[:20]:
            span = f"{1000 * c.first_time:.0f} to {1000 * c.last_time:.0f} ms"
            if c.lowest_frequency is not None:
                span += f", {c.lowest_frequency:g}-{c.highest_frequency:g} Hz"
            size = ("" if c.effect_size is None else
                    f"; average {result.effect_size_name} = {c.effect_size:.2f} "
                    f"[{c.effect_size_low:.2f}, {c.effect_size_high:.2f}] (selected: biased upwards)")
            if c.estimate_low is not None:
                size += (f"; average estimate {c.estimate:.3g} [bootstrap {c.estimate_low:.3g}, "
                         f"{c.estimate_high:.3g}]")
            lines.append(f"    #{c.id} {c.sign}, {span}, {c.extent} points, p = {c.p:.4g}; peak "
                         f"{c.peak_channel} {1000 * c.peak_time:.0f} ms ({result.kind} = "
                         f"{c.peak_statistic:.2f}); channels {' '.join(c.channels)}{size}")
        if len(sig) > 20:
            lines.append(f"    ... and {len(sig) - 20} more")
    if f["n_nonfinite"]:
        lines.append(f"  warning: the statistic is not finite at {f['n_nonfinite']} points "
                     "(zero variance, a variance at rounding level or underflowed, or missing "
                     "data); they have no p-value, are left out of the correction's family and "
                     "are never significant")
    rc = result.residual_checks
    if rc is not None:
        outcome = (f"not tested: {normality_not_tested(result.n_subjects)}" if rc.share_rejected is None
                   else f"rejected at {100 * rc.share_rejected:.1f} % of points (about "
                        f"{100 * rc.alpha:g} % by chance)")
        lines.append(f"  residual checks: normality ({rc.normality_test}) {outcome}; "
                     f"median |skewness| {rc.median_abs_skewness:.2f}, median excess kurtosis "
                     f"{rc.median_excess_kurtosis:.2f}"
                     + (f"; outlying subjects {', '.join(rc.outlying_subjects)}" if rc.outlying_subjects else ""))
    for n in result.notes:
        lines.append(f"  note: {n}")
    lines.append(f"  caution: {CAUTION}")
    if result.resampling is not None:
        lines.append(f"  caution: {CLUSTER_CAUTION}")
    return "\n".join(lines)
