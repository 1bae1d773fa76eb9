"""One self-contained HTML report of a run: design, methods text, and every test with its figures.

The page needs nothing but a browser: figures are PNG images embedded as data URIs, the style
sheet is inline, and no script or remote resource is loaded. A report never fails a run that
succeeded: a figure that cannot be drawn (matplotlib missing, no frequency axis, ...) is
replaced by a note saying why, and the rest is written.
"""

from __future__ import annotations

import base64
import html
import io
import logging

import numpy as np

from ..group_level.assumptions import normality_not_tested
from .methods import methods_paragraph
from ..results import CAUTION, CLINICAL_CAUTION, CLUSTER_CAUTION, RunResult, TestResult

__all__ = ["render_report"]

log = logging.getLogger("glmeeg")

_STYLE = """
body { font-family: "DejaVu Sans", "Helvetica Neue", Arial, sans-serif; max-width: 72em;
       margin: 2em auto; padding: 0 1em; color: #1b1b1b; line-height: 1.45; }
h1 { font-size: 1.6em; border-bottom: 2px solid #3b4d61; padding-bottom: .2em; }
h2 { font-size: 1.3em; margin-top: 2em; color: #3b4d61; }
h3 { font-size: 1.05em; }
table { border-collapse: collapse; font-size: .9em; margin: .6em 0; display: block;
        max-width: 100%; overflow-x: auto; }
td.text { max-width: 28em; overflow-wrap: anywhere; }
th, td { border: 1px solid #c9ced6; padding: .2em .5em; text-align: right; }
th { background: #eef1f5; }
td.text, th.text { text-align: left; }
.caution { background: #fff6e0; border-left: 4px solid #d08c00; padding: .5em .8em; }
.note { color: #6b4e00; font-style: italic; }
figure { margin: 1em 0; }
figure img { max-width: 100%; height: auto; border: 1px solid #e2e5ea; }
pre.methods { white-space: pre-wrap; background: #f6f7f9; padding: .8em; font-family: inherit; }
"""


def _esc(x) -> str:
    return html.escape(str(x))


def _png(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    import matplotlib.pyplot as plt

    plt.close(fig)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _figure(title: str, draw) -> str:
    """An embedded figure, or a note saying why it could not be drawn."""
    try:
        data = _png(draw())
    except Exception as e:  # a figure must never fail the report
        log.debug("figure %r not drawn", title, exc_info=True)
        reason = str(e).splitlines()[0] if str(e) else type(e).__name__
        return f'<p class="note">Figure "{_esc(title)}" could not be drawn: {_esc(reason)}</p>'
    return (f'<figure><img alt="{_esc(title)}" src="data:image/png;base64,{data}">'
            f"<figcaption>{_esc(title)}</figcaption></figure>")


def _table(frame, *, text_columns=()) -> str:
    head = "".join(f'<th class="{"text" if c in text_columns else ""}">{_esc(c)}</th>' for c in frame.columns)
    rows = []
    for _, r in frame.iterrows():
        cells = []
        for c in frame.columns:
            v = r[c]
            if isinstance(v, float | np.floating):
                v = "" if np.isnan(v) else f"{v:.4g}"
            cells.append(f'<td class="{"text" if c in text_columns else ""}">{_esc(v)}</td>')
        rows.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><tr>{head}</tr>{''.join(rows)}</table>"


def _figures():
    from . import figures

    return figures


def _design_section(run: RunResult) -> str:
    import pandas as pd

    sm = run.design.get("subject_model", {})
    parts = ["<h2>Design</h2>",
             f"<p>Subject model: <code>y ~ {_esc(run.subject_formula)}</code>; columns "
             f"{_esc(', '.join(run.subject_columns))}.</p>"]
    for name, levels in (sm.get("levels") or {}).items():
        parts.append(f"<p>Factor {_esc(name)}: levels {_esc(', '.join(levels))} (reference "
                     f"{_esc(levels[0])}).</p>")
    if sm.get("robust"):
        parts.append(f"<p>Robust subject-level fit: {_esc(sm['robust'])}.</p>")
    frame = pd.DataFrame([{"subject": s.subject, "epochs in file": s.epochs_in_file,
                           "trials listed": s.trials_listed, "trials used": s.trials_used,
                           "rows dropped": s.rows_dropped, "residual df": s.df_resid,
                           "condition number": s.condition_number} for s in run.subjects])
    parts.append(_table(frame, text_columns=("subject",)))
    if run.example_design is not None:
        who = run.example_design_subject
        parts.append(_figure(f"subject-level design of {who} ({len(run.example_design)} trials)",
                             lambda: _figures().design_image(np.asarray(run.example_design),
                                                             run.subject_columns,
                                                             title=f"subject design ({who})",
                                                             row_label="trial")))
    for w in run.warnings:
        parts.append(f'<p class="note">Warning: {_esc(w)}</p>')
    return "\n".join(parts)


def _test_section(t: TestResult) -> str:
    figures = _figures()
    parts = [f'<h2 id="test-{_esc(t.name)}">Test {_esc(t.name)}</h2>',
             "<pre class=\"methods\">" + _esc(str(t)) + "</pre>"]
    parts.append(_figure(f"{t.name}: {t.kind} statistic at every channel and time, significant "
                         "points outlined", lambda: figures.statistic_image(t)))
    parts.append(_figure(f"{t.name}: group estimate over time at every channel, significant spans "
                         "marked", lambda: figures.estimate_time_courses(t)))
    peaks = [c for c in t.clusters if c.significant][:4]
    if t.axes.frequencies is None:
        for c in peaks:
            parts.append(_figure(f"{t.name}: scalp map at the peak of cluster #{c.id} "
                                 f"({1000 * c.peak_time:.0f} ms)",
                                 lambda c=c: figures.scalp_map(t, time=c.peak_time)))
        if not peaks:
            parts.append(_figure(f"{t.name}: scalp map at the largest statistic",
                                 lambda: figures.scalp_map(t)))
    if t.axes.frequencies is not None:
        stat = np.nan_to_num(np.abs(t.map("statistic")))
        channel = t.axes.channels[int(np.argmax(stat.reshape(len(t.axes.channels), -1).max(axis=1)))]
        parts.append(_figure(f"{t.name}: frequency x time at {channel} (largest statistic)",
                             lambda: figures.frequency_time_image(t, channel=channel)))
    if t.group_design is not None:
        parts.append(_figure(f"{t.name}: group design ({t.n_subjects} subjects)",
                             lambda: figures.design_image(np.asarray(t.group_design), t.group_columns,
                                                          title=f"group design of {t.name}",
                                                          row_label="subject")))
    if t.clusters:
        frame = t.clusters_frame()
        parts.append("<h3>Clusters and regions</h3>")
        parts.append(_table(frame, text_columns=("kind", "sign", "channels", "peak_channel")))
    elif t.resampling is not None:
        parts.append("<p>No clusters or regions of significant points.</p>")
    rc = t.residual_checks
    if rc is not None:
        share = (f"not tested ({normality_not_tested(t.n_subjects)})" if rc.share_rejected is None
                 else f"{100 * rc.share_rejected:.1f} % of points")
        parts.append(f"<h3>Assumption checks</h3><p>Normality of group-level residuals "
                     f"({_esc(rc.normality_test)}, alpha {rc.alpha:g}) rejected at {share}; median "
                     f"|skewness| {rc.median_abs_skewness:.2f}; median excess kurtosis "
                     f"{rc.median_excess_kurtosis:.2f}"
                     + (f"; outlying subjects: {_esc(', '.join(rc.outlying_subjects))}" if rc.outlying_subjects else "")
                     + ".</p>")
    return "\n".join(parts)


def render_report(run: RunResult, *, title: str | None = None) -> str:
    """The HTML report of a run, as one self-contained page.

    Parameters
    ----------
    run : RunResult
        A finished run (:func:`glmeeg.run_analysis`, or a run folder read back).
    title : str, optional
        Page title; default "glmeeg report" with the design file's name.

    Returns
    -------
    str
        The page. Figures need matplotlib (``pip install 'glmeeg[plots]'``); without it each
        figure is replaced by a note and the rest of the report is complete.
    """
    design = run.provenance.design_file
    title = title or ("glmeeg report" + (f": {design}" if design else ""))
    cautions = [CAUTION, CLUSTER_CAUTION, CLINICAL_CAUTION]
    try:
        methods = methods_paragraph(run)
    except Exception as e:  # the methods text must not fail the report either
        log.debug("methods paragraph not written", exc_info=True)
        methods = f"(the methods paragraph could not be written: {e})"
    body = [f"<h1>{_esc(title)}</h1>",
            f"<p>{len(run.subjects)} subjects; {len(run.tests)} test(s): "
            + ", ".join(f'<a href="#test-{_esc(t.name)}">{_esc(t.name)}</a>' for t in run.tests)
            + f". Created {_esc(run.provenance.created)} with glmeeg {_esc(run.provenance.glmeeg_version)}.</p>",
            '<div class="caution">' + "".join(f"<p>{_esc(c)}</p>" for c in cautions) + "</div>",
            _design_section(run),
            "<h2>Methods</h2>",
            '<pre class="methods">' + _esc(methods) + "</pre>"]
    body += [_test_section(t) for t in run.tests]
    # The generator tag marks the page as glmeeg's, so a later `glmeeg report` may replace it.
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f'<meta name="generator" content="glmeeg {_esc(run.provenance.glmeeg_version)}">'
            f"<title>{_esc(title)}</title><style>{_STYLE}</style></head><body>\n"
            + "\n".join(body) + "\n</body></html>\n")
