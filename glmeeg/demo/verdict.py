"""The demo's verdict: what glmeeg found, held against the planted truth (:data:`DEMO_TRUTH`)."""

from __future__ import annotations

from .study import DEMO_TRUTH, DemoTruth


def _spans(result, channels: tuple[str, ...]) -> tuple[list[str], float, float, int]:
    f = result.findings()
    rows = [c for c in f["channels"] if c["channel"] in channels]
    if not rows:
        return [], float("nan"), float("nan"), 0
    return ([c["channel"] for c in rows], min(c["first_time"] for c in rows),
            max(c["last_time"] for c in rows), sum(c["n_points"] for c in rows))


def demo_verdict(run, truth: "DemoTruth | None" = None) -> str:
    """Compare a demo run with the planted truth, in words.

    Parameters
    ----------
    run : glmeeg.results.RunResult
        Result of analysing a study written by :func:`write_demo_study`.
    truth : DemoTruth, optional
        Default :data:`DEMO_TRUTH`.

    Returns
    -------
    str
        One line per planted effect (found where and when, or not), one for the noise-only
        channels over every test, and the cautions.
    """
    truth = truth or DEMO_TRUTH
    names = {t.name for t in run.tests}
    lines = ["What the demo found, against what was planted:"]
    for test, effect, what in (("urgency-high-vs-low", truth.urgency, "urgency (high vs low)"),
                               ("loudness", truth.loudness, "loudness")):
        if test not in names:
            continue
        chans, first, last, n = _spans(run.test(test), effect.channels)
        planted = (f"planted at {', '.join(effect.channels)}, "
                   f"{effect.window[0] * 1000:.0f}-{effect.window[1] * 1000:.0f} ms")
        if n:
            lines.append(f"  {what}: FOUND, {n} significant points at {', '.join(chans)}, "
                         f"{first * 1000:.0f} to {last * 1000:.0f} ms ({planted})")
        else:
            lines.append(f"  {what}: not found ({planted})")
    if "urgency-pilots-vs-trainees" in names:
        n = run.test("urgency-pilots-vs-trainees").n_significant
        lines.append(f"  pilots vs trainees in the urgency effect: {n} significant points (planted: "
                     f"pilots' effect {truth.pilot_to_trainee:g}x trainees'; with 14 per group this "
                     "difference is hard to detect: a question for a power analysis)")
    noise = set(truth.noise_only)
    # A cluster test makes one claim per cluster, not per point: its edges may reach channels
    # with no planted signal. Those tests are described, not counted as point-wise errors.
    pointwise = [t for t in run.tests if t.correction.method != "cluster"]
    false_hits = {t.name: sum(c["n_points"] for c in t.findings()["channels"] if c["channel"] in noise)
                  for t in pointwise}
    total = sum(false_hits.values())
    names = ", ".join(t.name for t in pointwise)
    if total == 0:
        lines.append(f"  noise-only channels ({len(noise)}: {', '.join(sorted(noise))}): no significant "
                     f"points in the point-wise tests ({names}), as planted")
    else:
        lines.append("  noise-only channels: significant points in "
                     + ", ".join(f"{k} ({v})" for k, v in false_hits.items() if v)
                     + " (false positives; expected now and then at the chosen error rate)")
    for t in run.tests:
        if t.correction.method != "cluster":
            continue
        for c in (c for c in t.clusters if c.significant):
            outside = [ch for ch in c.channels if ch in noise]
            lines.append(f"  {t.name} (cluster test): cluster #{c.id}, {c.first_time * 1000:.0f} to "
                         f"{c.last_time * 1000:.0f} ms, peak {c.peak_channel} {c.peak_time * 1000:.0f} ms, "
                         f"p = {c.p:.3g}" + (f"; its edges reach {len(outside)} channel(s) with no planted "
                                            "signal, as cluster edges do" if outside else ""))
    lines.append("  Cluster and point-wise tests say that an effect exists; the edges of the "
                 "significant region are not estimates of its exact onset or extent.")
    return "\n".join(lines)
