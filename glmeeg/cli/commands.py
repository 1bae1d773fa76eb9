"""Command-line interface: a thin layer over the Python API.

Every input error is a :class:`~glmeeg.errors.GlmeegError`; it is caught here once, printed as
one line on stderr and turned into exit code 2.
"""

from __future__ import annotations

import sys
from functools import wraps
from pathlib import Path
from typing import Annotated, Optional

import typer

from .. import defaults

app = typer.Typer(name="glmeeg", add_completion=False, no_args_is_help=True,
                  pretty_exceptions_enable=False,
                  help="Mass-univariate GLM statistics for epoched EEG: single-trial regressions in "
                       "every participant, group t/F maps at every channel x time point, corrected "
                       "p-values and effect sizes. Research software, not for clinical diagnosis.")


# The progress display of the running command, closed before an error line is printed.
_open_progress: list = [None]


def _close_progress() -> None:
    if _open_progress[0] is not None:
        _open_progress[0].close()
        _open_progress[0] = None


def _warning_as_note(message, category, filename, lineno, file=None, line=None) -> None:
    """A warning of numpy, pandas or another library, as one line of glmeeg's log."""
    import logging

    text = " ".join(str(message).split())
    text = f"note: {text if len(text) <= 300 else text[:297] + '...'}"
    logger = logging.getLogger("glmeeg")
    if logger.handlers:  # the command's own log (it keeps progress bars intact)
        logger.warning("%s", text)
    else:
        typer.echo(text, err=True)


def _end_command_log() -> None:
    """Remove the glmeeg logger's handler that a command installed (``_progress``): it writes to
    that command's stderr, where a later command run in the same process (tests, notebooks) must
    not write its notes."""
    import logging

    logger = logging.getLogger("glmeeg")
    if logger.handlers:
        from ..progress import _HANDLER_MARK

        for h in list(logger.handlers):
            if getattr(h, _HANDLER_MARK, False):
                logger.removeHandler(h)


def _reports_errors(fn):
    @wraps(fn)
    def wrapper(*args, **kwargs):
        import warnings

        from . import INTERRUPTED
        from ..errors import GlmeegError

        try:
            try:
                with warnings.catch_warnings():
                    # Never a raw warning with its source line on the terminal: one note line.
                    warnings.showwarning = _warning_as_note
                    # glmeeg's own deprecations (an old option name) are for the user to see;
                    # Python hides DeprecationWarnings outside __main__ by default.
                    warnings.filterwarnings("default", category=DeprecationWarning,
                                            module=r"glmeeg(\.|$)")
                    return fn(*args, **kwargs)
            finally:
                _close_progress()
                _end_command_log()
        except GlmeegError as e:
            _close_progress()
            typer.echo(f"error: {e}", err=True)
            raise typer.Exit(2) from None
        except KeyboardInterrupt:
            _close_progress()
            typer.echo(INTERRUPTED, err=True)
            raise typer.Exit(130) from None
    return wrapper


def _version(value: bool) -> None:
    if value:
        from .._version import __version__

        typer.echo(f"glmeeg {__version__}")
        raise typer.Exit()


@app.callback()
def _main(version: Annotated[Optional[bool], typer.Option("--version", callback=_version,
                                                          is_eager=True, help="Print the version.")] = None) -> None:
    """glmeeg command line."""


def _progress(quiet: bool, verbose: bool = False):
    """The command's progress display (None with --quiet); sets up logging to stderr too."""
    import sys as real_sys  # the process's own stderr (tests may stand in for ``sys``)

    from ..progress import ProgressBars, configure_logging

    stream = real_sys.stderr
    live = sys.stderr.isatty()
    bars = ProgressBars(stream, live=live)
    configure_logging(stream, verbose=verbose, quiet=quiet, console=bars.console if live else None)
    if quiet:
        return None
    _open_progress[0] = bars
    return bars


@app.command()
@_reports_errors
def run(design: Annotated[Path, typer.Argument(help="Design file (TOML).")],
        out: Annotated[Path, typer.Option("--out", "-o", help="Output folder (created; an earlier "
                                                               "glmeeg result there is replaced).")],
        workers: Annotated[int, typer.Option("--workers", "-w", min=1, help="Worker processes on this "
                                             "machine; more than 1 starts a local Dask cluster "
                                             "(needs glmeeg[dask]).")] = 1,
        scheduler: Annotated[Optional[str], typer.Option("--scheduler", help="Address of a running Dask "
                                                         "scheduler to run on (e.g. tcp://10.0.0.5:8786); "
                                                         "its workers must see the study files at the "
                                                         "same paths.")] = None,
        memory_limit: Annotated[Optional[str], typer.Option("--memory-limit", help="Memory budget, e.g. "
                                                            "4GB or 512MiB (default: half of this "
                                                            "machine's memory, 1-16 GiB).")] = None,
        refit: Annotated[bool, typer.Option("--refit", help="Refit every subject, ignoring the fits "
                                            "cached in OUT/subject-fits.")] = False,
        quiet: Annotated[bool, typer.Option("--quiet", "-q", help="Print nothing but errors.")] = False,
        verbose: Annotated[bool, typer.Option("--verbose", "-v", help="Log each subject fitted or "
                                              "taken from the cache.")] = False,
        no_report: Annotated[bool, typer.Option("--no-report", help="Do not write report.html.")] = False) -> None:
    """Fit every subject and run every test of DESIGN; write results (and report.html) to OUT.

    Finished subject fits are kept in OUT/subject-fits: a run that was interrupted, or a re-run
    with other tests, refits only what changed.
    """
    from ..parallel import parse_size
    from ..pipeline import plan_analysis, run_analysis
    from ..subject_level.cache import CACHE_FOLDER
    from ..results import check_output_folder, write_run

    limit = None if memory_limit is None else parse_size(memory_limit)
    out = check_output_folder(out)  # before fitting: a wrong --out should cost nothing
    result = run_analysis(plan_analysis(design), progress=_progress(quiet, verbose), memory_limit=limit,
                          workers=workers, scheduler=scheduler, cache=Path(out) / CACHE_FOLDER, refit=refit)
    _close_progress()
    write_run(result, out, report=None if no_report else _report(result))
    if not quiet:
        typer.echo(str(result))
        typer.echo(f"results written to {out}")


@app.command()
@_reports_errors
def check(design: Annotated[Path, typer.Argument(help="Design file (TOML).")],
          data: Annotated[bool, typer.Option("--data", help="Also fit the subjects and report on the "
                                             "assumptions: outlying trials and subjects, normality "
                                             "of group-level residuals.")] = False) -> None:
    """Show what `run` would do (subjects, epochs, design columns, contrasts) without fitting."""
    from ..pipeline import check_assumptions, plan_analysis

    plan = plan_analysis(design)
    typer.echo(plan.describe())
    if data:
        typer.echo(check_assumptions(plan))
    typer.echo("design OK")


@app.command()
@_reports_errors
def neighbours(design: Annotated[Path, typer.Argument(help="Design file (TOML).")],
               out: Annotated[Optional[Path], typer.Option("--out", "-o", help="Write the pairs as a "
                              "neighbour table (CSV: channel, neighbour) usable as \\[data] neighbours.")] = None,
               method: Annotated[Optional[str], typer.Option("--method", help="pruned-triangulation "
                                 "| radius: neighbours from sensor positions, by the Delaunay "
                                 "triangulation of the positions projected from the vertex with its "
                                 "long edges pruned (default), or within a radius (--max-distance). "
                                 "A run uses the default, or the table written with --out given as "
                                 "\\[data] neighbours.")] = None,
               max_distance: Annotated[Optional[float], typer.Option("--max-distance", help="With "
                                       "--method radius: the radius in median nearest-neighbour "
                                       "spacings (default 1.5).")] = None) -> None:
    """Show which sensors count as neighbours for cluster and TFCE corrections."""
    from ..errors import GlmeegError
    from ..sensors.neighbours import sensor_graph
    from ..results.ownership import check_replaceable
    from ..spec import load_design
    from ..study import read_neighbour_table, read_study

    if out is not None:  # before any work: a file of the user's there is never replaced
        check_replaceable(out, kind="table", label="--out (neighbour table)")
    spec = load_design(design)
    study = read_study(spec.data, root=design.parent)
    table = None
    if spec.data.neighbours is not None:
        table = read_neighbour_table(design.parent / spec.data.neighbours, label=spec.data.neighbours)
    if table is not None and (method is not None or max_distance is not None):
        raise GlmeegError(f"--{'method' if method is not None else 'max-distance'}: applies to "
                          f"neighbours found from positions; the design file gives the neighbour "
                          f"table {spec.data.neighbours}")
    graph = sensor_graph(study.sensors, neighbour_table=table, neighbour_label=spec.data.neighbours or "",
                         sensors_label=spec.data.channels, method=method or "pruned-triangulation",
                         max_distance=max_distance)
    typer.echo(str(graph))
    if graph.isolated:
        typer.echo(f"warning: {len(graph.isolated)} sensor(s) have no neighbours: "
                   f"{', '.join(graph.isolated)}", err=True)
    if out is not None:
        from ..results import write_table
        write_table(graph.to_frame(), out, label="--out (neighbour table)")
        typer.echo(f"neighbour table written to {out}")


@app.command()
@_reports_errors
def show(result: Annotated[Path, typer.Argument(help="A run's output folder, or one test's folder.")]) -> None:
    """Print a readable summary of saved results."""
    from ..results import CLINICAL_CAUTION, load_test_results

    for t in load_test_results(result):
        typer.echo(str(t))
    typer.echo(CLINICAL_CAUTION)


@app.command()
@_reports_errors
def demo(folder: Annotated[Path, typer.Argument(help="Folder for the demo study and its results.")] = Path("glmeeg-demo"),
         subjects: Annotated[int, typer.Option(min=4, max=99, help="Number of volunteers to simulate (4-99).")] = 28,
         seed: Annotated[int, typer.Option(help="Seed of the simulated data.")] = 20261201,
         quiet: Annotated[bool, typer.Option("--quiet", "-q", help="Print only the verdict.")] = False) -> None:
    """Write the demo study (alarm urgency in ship pilots and trainees), analyse it, print findings."""
    from ..pipeline import run_analysis
    from ..results import write_run
    from ..demo import demo_verdict, write_demo_study

    from ..results import check_output_folder
    from ..demo import check_demo_folder

    folder = check_demo_folder(folder)
    check_output_folder(folder / "results")
    if not quiet:
        typer.echo(f"writing the demo study ({subjects} volunteers) to {folder} ...", err=True)
    design = write_demo_study(folder, n_subjects=subjects, seed=seed)
    result = run_analysis(design, progress=_progress(quiet))
    _close_progress()
    out = write_run(result, folder / "results", report=_report(result))
    if not quiet:
        typer.echo(str(result))
        typer.echo(f"results written to {out}")
    typer.echo(demo_verdict(result))


def _report(result) -> str | None:
    """The run's HTML report; None (with a warning) if it cannot be made: a report never fails
    a run that succeeded."""
    try:
        from ..report.html import render_report
        return render_report(result)
    except Exception as e:  # noqa: BLE001 - anything: the results matter more than the report
        typer.echo(f"warning: report.html not written ({e})", err=True)
        return None


@app.command()
@_reports_errors
def report(results: Annotated[Path, typer.Argument(help="A run's output folder.")],
           out: Annotated[Optional[Path], typer.Option("--out", "-o", help="Report file (default: "
                                                       "RESULTS/report.html).")] = None) -> None:
    """Write the self-contained HTML report of a finished run (figures need glmeeg[plots])."""
    from ..report.html import render_report
    from ..results import load_run_folder, write_report

    run = load_run_folder(results)
    path = write_report(results, render_report(run), out=out)
    typer.echo(f"report written to {path}")


@app.command()
@_reports_errors
def schema(out: Annotated[Optional[Path], typer.Option("--out", "-o", help="Write the schema to "
                                                       "this file instead of printing it.")] = None) -> None:
    """Print the JSON Schema of a test's summary.json (versioned; one JSON document)."""
    import json

    from ..results import summary_schema, write_text

    text = json.dumps(summary_schema(), indent=2) + "\n"
    if out is None:
        typer.echo(text, nl=False)
        return
    write_text(text, out, kind="schema", label="--out (schema)")
    typer.echo(f"schema written to {out}", err=True)


_POWER_OPTIONS = {"effect_size": "--effect-size", "n": "--n", "alpha": "--alpha", "power": "--power",
                  "design": "--design", "alternative": "--alternative",
                  "df_numerator": "--df-numerator", "groups": "--groups", "n_values": "--curve"}
# simulate_power's keywords, as the options of `glmeeg simulate-power`.
_SIMULATION_OPTIONS = {"n": "--n", "simulations": "--simulations", "effect_scale": "--effect-scale",
                       "permutations": "--permutations", "correction": "--correction", "alpha": "--alpha",
                       "seed": "--seed", "graph": "--neighbours", "result": "TEST"}


def _parse_curve(text: str, option: str = "--curve") -> list[float]:
    from ..errors import GlmeegError

    try:
        values = [float(v) for v in text.split(",") if v.strip()]
    except ValueError:
        values = []
    if not values:
        raise GlmeegError(f"{option}: expected comma-separated sample sizes such as 16,24,32, got {text!r}")
    return [int(v) if v.is_integer() else v for v in values]


def _one_n(text: str | None):
    """--n of the parametric calculation: one number (checked by solve_power)."""
    from ..errors import GlmeegError

    if text is None:
        return None
    try:
        value = float(text)
    except ValueError:
        hint = (" (a list of sizes: --curve, or glmeeg simulate-power for a saved test)"
                if "," in text else "")
        raise GlmeegError(f"--n: expected a whole number of participants, got {text!r}{hint}") from None
    return int(value) if value.is_integer() else value


_POWER_HELP = ("Solve the missing one of effect size, n, power (or alpha) of a t or F test.\n\n"
               "Leave out exactly one of --effect-size, --n and --power, and it is solved; --alpha "
               f"is {defaults.ALPHA:g} unless given. To solve alpha, give the other three and --solve "
               "alpha. The numbers come from the exact noncentral t or F distribution (Cohen, 1988) "
               "and hold for one test at --alpha: a correction over many points lowers the effective "
               "alpha; `glmeeg simulate-power` simulates the real, corrected design of a saved test.")


@app.command("power", help=_POWER_HELP)
@_reports_errors
def power_command(
        design: Annotated[Optional[str], typer.Option("--design", help="one-sample | paired | "
                          "two-sample | f (required).")] = None,
        effect_size: Annotated[Optional[float], typer.Option("--effect-size", help="Cohen's d "
                               "(one-sample, two-sample), dz (paired) or f (F test), >= 0, in the "
                               "direction of --alternative.")] = None,
        n: Annotated[Optional[str], typer.Option("--n", help="Participants: per group for "
                     "two-sample (equal groups), in total otherwise.")] = None,
        target_power: Annotated[Optional[float], typer.Option("--power", help="Power, in (0, 1).")] = None,
        alpha: Annotated[Optional[float], typer.Option("--alpha", help="Significance level of one "
                         f"test, in (0, 1); {defaults.ALPHA:g} unless solved with --solve alpha.")] = None,
        solve: Annotated[Optional[str], typer.Option("--solve", help="Quantity to solve: n | "
                         "effect-size | power | alpha. Optional: inferred when exactly one of "
                         "--effect-size, --n, --power is left out; needed only for alpha.")] = None,
        alternative: Annotated[str, typer.Option("--alternative", help="two-sided | greater | less "
                               "(t designs; F tests are two-sided).")] = "two-sided",
        df_numerator: Annotated[Optional[int], typer.Option("--df-numerator", help="F: numerator "
                                "df (k - 1 for a one-way ANOVA of k groups).")] = None,
        groups: Annotated[Optional[int], typer.Option("--groups", help="F: parameters of the full "
                          "model, intercept included (k for a one-way ANOVA); denominator df = N - "
                          "groups. Default: --df-numerator + 1.")] = None,
        curve: Annotated[Optional[str], typer.Option("--curve", help="Also print the power at "
                         "these sample sizes, e.g. 16,24,32.")] = None,
        plot: Annotated[Optional[Path], typer.Option("--plot", help="With --curve: draw the power "
                        "curve into this PNG file (needs glmeeg[plots]).")] = None,
        as_json: Annotated[bool, typer.Option("--json", help="Print one JSON object.")] = False) -> None:
    """Power and sample size of one t or F test (``glmeeg.planning.analytic.solve_power``)."""
    import json

    from ..errors import GlmeegError
    from ..planning.analytic import power_curve, solve_power

    if plot is not None:
        from ..results.ownership import check_replaceable

        check_replaceable(plot, kind="png", label="--plot")
        if curve is None:
            raise GlmeegError("--plot: draws the power curve; give --curve too (e.g. --curve 12,16,24,32)")
    if design is None:
        raise GlmeegError("--design: required: one of one-sample, paired, two-sample, f")
    n = _one_n(n)
    alpha = _alpha_to_use(solve, alpha, effect_size=effect_size, n=n, power=target_power)
    try:
        solution = solve_power(design=design, effect_size=effect_size, n=n, alpha=alpha,
                               power=target_power, alternative=alternative,
                               df_numerator=df_numerator, groups=groups)
        table = None
        if curve is not None:
            table = power_curve(design=design, effect_size=solution.effect_size, alpha=solution.alpha,
                                n_values=_parse_curve(curve), alternative=alternative,
                                df_numerator=df_numerator, groups=groups)
    except GlmeegError as e:  # the library names its keywords; here the user typed options
        raise e.renamed(_POWER_OPTIONS) from None
    if plot is not None:
        from ..report.figures import power_curve_figure
        from ..results import write_figure

        label = "n per group" if solution.design == "two-sample" else "n (participants)"
        write_figure(power_curve_figure(table, target=solution.power, n_label=label), plot, label="--plot")
    if as_json:
        record = solution.model_dump(mode="json")
        record["warnings"] = list(solution.warnings)
        record["assumptions"] = solution.assumptions()
        if table is not None:
            record["curve"] = table.to_dict(orient="records")
        typer.echo(json.dumps(record))
        return
    typer.echo(str(solution))
    if table is not None:
        per = " per group" if solution.design == "two-sample" else ""
        typer.echo(f"power at other sample sizes (n{per}; effect size {solution.effect_size:.4g}, "
                   f"alpha {solution.alpha:.4g}):")
        typer.echo(table.to_string(index=False, float_format=lambda x: f"{x:.4f}"))


def _alpha_to_use(solve: str | None, alpha: float | None, **given) -> float | None:
    """The alpha to use (None when it is solved), after checking that exactly one quantity is
    left to solve."""
    from ..errors import GlmeegError

    names = {"effect_size": "effect-size", "n": "n", "power": "power"}
    if solve is not None:
        if solve not in ("n", "effect-size", "power", "alpha"):
            raise GlmeegError(f"--solve: expected one of n, effect-size, power, alpha, got {solve!r}")
        if solve == "alpha" and alpha is not None:
            raise GlmeegError("--solve alpha: leave out --alpha, the quantity solved")
        if solve != "alpha" and given[solve.replace("-", "_")] is not None:
            raise GlmeegError(f"--solve {solve}: leave out --{solve}, the quantity solved")
    missing = [names[k] for k, v in given.items() if v is None]
    if solve == "alpha" and missing:
        raise GlmeegError(f"--solve alpha: give --effect-size, --n and --power; missing "
                          f"{', '.join('--' + m for m in missing)}")
    if len(missing) > 1:
        raise GlmeegError(f"more than one unknown: {' and '.join('--' + m for m in missing)} are "
                          f"missing; give all but one of --effect-size, --n, --power")
    if not missing and solve != "alpha":
        raise GlmeegError("nothing to solve: leave out one of --effect-size, --n, --power "
                          "(or give all three and --solve alpha)")
    return defaults.ALPHA if solve != "alpha" and alpha is None else alpha


_SIMULATE_HELP = ("Simulate the power of a saved test's own design at other sample sizes.\n\n"
                  "New studies of each n are drawn from the test's effect map and its subjects' noise "
                  "maps and analysed with the same group test and correction; the share that detect "
                  "the effect (any significant point; a significant point in the test's significant "
                  "region) is the power, with its Monte-Carlo error "
                  "(glmeeg.planning.simulated.simulate_power).")


@app.command("simulate-power", help=_SIMULATE_HELP)
@_reports_errors
def simulate_power_command(
        test: Annotated[Path, typer.Argument(help="A saved test's folder in a run's output "
                        "(RESULTS/TEST).")],
        n: Annotated[Optional[str], typer.Option("--n", help="The sample sizes to simulate, "
                     "comma-separated (per group for designs with groups).")] = None,
        alpha: Annotated[Optional[float], typer.Option("--alpha", help="Significance level; default "
                         "the saved test's.")] = None,
        simulations: Annotated[Optional[int], typer.Option("--simulations", help="Simulated studies "
                               f"per n (default {defaults.SIMULATIONS}).")] = None,
        correction: Annotated[Optional[str], typer.Option("--correction", help="none | bonferroni | "
                              "holm | fdr | max-statistic | cluster | tfce; default the test's own (with its "
                              "settings).")] = None,
        permutations: Annotated[Optional[int], typer.Option("--permutations", help="Resamplings per "
                                "simulated study for max-statistic / cluster / tfce (default "
                                f"{defaults.SIMULATED_PERMUTATIONS}).")] = None,
        effect_scale: Annotated[Optional[float], typer.Option("--effect-scale", help="Factor on the "
                                "test's observed effect, > 0 (default 1; below 1 allows for a pilot "
                                "effect inflated by selection).")] = None,
        seed: Annotated[Optional[int], typer.Option("--seed", help="Seed of the simulation "
                        "(default 0).")] = None,
        neighbours: Annotated[Optional[Path], typer.Option("--neighbours", help="Cluster and tfce: "
                              "neighbour table (CSV: channel, neighbour; written by glmeeg "
                              "neighbours DESIGN --out FILE); default: from the 10-10 channel names.")] = None,
        csv: Annotated[Optional[Path], typer.Option("--csv", help="Also write the table (n, total_n, "
                       "criterion, detections, simulations, probability, standard_error, low, high) "
                       "to this CSV file.")] = None,
        as_json: Annotated[bool, typer.Option("--json", help="Print one JSON object.")] = False) -> None:
    """Simulated power of a saved test (``glmeeg.planning.simulated.simulate_power``)."""
    import json

    from ..errors import GlmeegError
    from ..inference.corrections import PERMUTATION_METHODS, correction_from_name
    from ..results import load_result

    if (test / "run.json").is_file() and not (test / "result.npz").is_file():
        tests = sorted(p.name for p in test.iterdir() if (p / "result.npz").is_file())
        example = f", e.g. {test / tests[0]}" if tests else ""
        raise GlmeegError(f"TEST: {test} is a run folder; give one test's folder{example}")
    result = load_result(test)
    if n is None:
        raise GlmeegError("--n: give the sample sizes to simulate, e.g. --n 16,24,32")
    sizes = _parse_curve(n, "--n")
    settings = result.correction
    if correction is not None and correction != result.correction.method:
        try:
            settings = correction_from_name(correction)
        except ValueError as e:
            raise GlmeegError(f"--correction: {e}") from None
    if permutations is not None and settings.method not in PERMUTATION_METHODS:
        raise GlmeegError(f"--permutations: applies to the max-statistic, cluster and tfce corrections; this "
                          f"simulation uses '{settings.method}'")
    graph = None
    if neighbours is not None:
        if settings.method not in ("cluster", "tfce"):
            raise GlmeegError(f"--neighbours: applies to the cluster and tfce corrections; this "
                              f"simulation uses '{settings.method}'")
        from ..sensors.neighbours import neighbours_from_table
        from ..study import read_neighbour_table

        table = read_neighbour_table(neighbours, label=str(neighbours))
        graph = neighbours_from_table(result.axes.channels, table, label=str(neighbours))
    if csv is not None:  # checked before simulating: a wrong --csv should not cost minutes
        _check_new_table(csv, "--csv")
    from ..planning.simulated import simulate_power

    try:
        sim = simulate_power(result, n=sizes, correction=settings, graph=graph, simulations=simulations,
                             permutations=permutations, alpha=alpha, progress=_simulation_progress(),
                             **{k: v for k, v in (("effect_scale", effect_scale), ("seed", seed))
                                if v is not None})
    except GlmeegError as e:
        _close_progress()
        raise e.renamed(_SIMULATION_OPTIONS) from None
    _close_progress()
    if csv is not None:
        from ..results import write_table
        write_table(sim.to_frame(), csv, label="--csv")
    if as_json:
        typer.echo(json.dumps(sim.model_dump(mode="json")))
        return
    typer.echo(str(sim))
    if csv is not None:
        typer.echo(f"table written to {csv}")


def _check_new_table(path: Path, option: str) -> None:
    """A table can be written at ``path``: never over a user's file, into a folder that exists."""
    import os

    from ..errors import GlmeegError
    from ..results.ownership import check_replaceable

    check_replaceable(path, kind="table", label=option)
    parent = path.absolute().parent
    if path.is_dir():
        raise GlmeegError(f"{option}: {path} is a folder; expected a file name")
    if not parent.is_dir():
        raise GlmeegError(f"{option}: {path} cannot be written, folder {parent} does not exist")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise GlmeegError(f"{option}: {path} cannot be written, no permission to write in {parent}")


def _simulation_progress():
    """Progress bars on a terminal (nothing otherwise)."""
    if not sys.stderr.isatty():
        return None
    bars = _progress(False)

    def show(n: int, done: int, total: int) -> None:
        bars(f"simulating n = {n}", done, total)
    return show
