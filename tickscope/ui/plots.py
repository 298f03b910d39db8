"""PNG figures (matplotlib, imported only here)."""
from __future__ import annotations

import numpy as np

from ..errors import ParameterError
from ..units import SECONDS_PER_DAY
from .layout import time_unit


def _plt():
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError as e:  # pragma: no cover - depends on the install
        raise ParameterError("plots need matplotlib: pip install 'tickscope[plots]'") from e
    return plt


def plot_analysis(summary, analyzer, path: str, *, title: str = "") -> None:
    """Timing residuals and ring-down per step of one analysis, as a PNG."""
    plt = _plt()
    unit, per = time_unit(summary.duration_s)
    fig, axes = plt.subplots(2, 1, figsize=(9, 6.5), constrained_layout=True)
    ax = axes[0]
    if summary.residuals_us is not None and len(summary.residuals_us):
        ax.plot(np.asarray(summary.residual_times_s) / per, summary.residuals_us, ".", ms=3, color="tab:blue",
                label="step, against the rate line")
    for i, t in enumerate(summary.missed_step_times_s):
        ax.axvline(t / per, color="tab:red", lw=0.8, alpha=0.6, label="missed step (where it was due)" if i == 0 else None)
    dg = summary.diagnosis
    for i, t in enumerate(dg.failed.times_s if dg is not None else ()):
        ax.axvline(t / per, color="tab:purple", lw=0.8, alpha=0.6, label="failed step" if i == 0 else None)
    ax.set_xlabel(f"time in recording ({unit})")
    ax.set_ylabel("timing residual (µs)")
    r = summary.rate
    ax.set_title(f"{title}: " + (f"rate {r.rate_s_per_day:+.4f} ± {r.ci95_s_per_day:.4f} s/day (95 %)" if r else "no rate"))
    ax.grid(alpha=0.3)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="upper right", fontsize=8)
    ax = axes[1]
    t = analyzer.step_t.values
    d = analyzer.step_decay.values
    pol = analyzer.step_pol.values
    for p, name, c in ((0, "A", "tab:green"), (1, "B", "tab:orange")):
        sel = (pol == p) & np.isfinite(d)
        ax.plot(t[sel] / per, d[sel], ".", ms=3, color=c, label=f"polarity {name}")
    ax.set_xlabel(f"time in recording ({unit})")
    ax.set_ylabel("ring-down decay τ (ms)")
    ax.legend(loc="upper right")
    ax.grid(alpha=0.3)
    _save(plt, fig, path)


def _shade_gaps(ax, fig, scale: float) -> None:
    for a, b, kind in fig.gaps:
        if kind == "restart":
            ax.axvline(a * scale, color="tab:blue", lw=0.8, ls=":", alpha=0.7)
        else:
            ax.axvspan(a * scale, b * scale, color="0.85", zorder=0, lw=0)


def _mark_anomalies(ax, fig, scale: float) -> None:
    for i, t in enumerate(fig.missed_times_s):
        ax.axvline(t * scale, color="tab:red", lw=0.6, alpha=0.5, label="missed step" if i == 0 else None)
    for i, t in enumerate(fig.failed_times_s):
        ax.axvline(t * scale, color="tab:purple", lw=0.6, alpha=0.5, label="failed step" if i == 0 else None)


def _save(plt, figure, path: str) -> None:
    try:
        figure.savefig(path, dpi=110)
    except OSError as e:
        raise ParameterError(f"cannot write {path}: {e.strerror}") from e
    finally:
        plt.close(figure)


def _finish_timeline(plt, f, ax, fig, path: str, *, ylabel: str, title: str, legend: bool = True) -> str:
    """Gaps, axis labels and extent, grid and legend of a plot against the log's timeline; saves it."""
    unit, per = time_unit(fig.span_s)
    _shade_gaps(ax, fig, 1 / per)
    ax.set_xlim(fig.start_s / per, (fig.start_s + max(fig.span_s, 1e-3)) / per)
    ax.set_xlabel(f"time since the log began ({unit}) — grey: no audio · dotted: analysis restarted")
    ax.set_ylabel(ylabel)
    ax.set_title(title)
    ax.grid(alpha=0.3)
    if legend:
        ax.legend(loc="best", fontsize=8)
    _save(plt, f, path)
    return path


def plot_log(fig, out_dir: str, *, title: str = "") -> list[str]:
    """rate.png, tie.png, adev.png and ringdown.png of a log report, and balance.png for a balance's
    beats with amplitudes; returns the paths written."""
    import os

    plt = _plt()
    os.makedirs(out_dir, exist_ok=True)
    _, per = time_unit(fig.span_s)
    draws = [_log_rate, _log_time_error, _log_adev, _log_ringdown]
    if any(h.get("amplitude_deg") is not None for h in fig.hourly):
        draws.append(_log_balance)
    return [draw(plt, fig, out_dir, title, per) for draw in draws]


def _log_balance(plt, fig, out_dir: str, title: str, per: float) -> str:
    """A balance's amplitude hour by hour, and each hour's rate against its amplitude (how the rate
    follows the swing: isochronism), each with its 95 % interval."""
    import os

    unit, _ = time_unit(fig.span_s)
    hrs = [h for h in fig.hourly if h.get("amplitude_deg") is not None]
    f, (ax, ax2) = plt.subplots(1, 2, figsize=(12, 5), constrained_layout=True)
    ax.errorbar([h["center_s"] / per for h in hrs], [h["amplitude_deg"] for h in hrs],
                yerr=[h["amplitude_ci95_deg"] for h in hrs], fmt="o-", ms=4, capsize=3, color="tab:blue")
    ax.set_xlabel(f"time since the log began ({unit})")
    ax.set_ylabel("balance amplitude (°)")
    ax.set_title(f"{title}: amplitude hour by hour")
    ax.grid(alpha=0.3)
    both = [h for h in hrs if h["rate_s_per_day"] is not None]
    if both:
        ax2.errorbar([h["amplitude_deg"] for h in both], [h["rate_s_per_day"] for h in both],
                     xerr=[h["amplitude_ci95_deg"] for h in both], yerr=[h["rate_ci95_s_per_day"] for h in both],
                     fmt="o", ms=4, capsize=3, color="tab:orange")
    ax2.set_xlabel("balance amplitude (°)")
    ax2.set_ylabel("rate (s/day, + gains)")
    ax2.set_title("each hour's rate against its amplitude")
    ax2.grid(alpha=0.3)
    path = os.path.join(out_dir, "balance.png")
    _save(plt, f, path)
    return path


def _log_rate(plt, fig, out_dir: str, title: str, per: float) -> str:
    """The rate over time: per minute, per hour with its interval, the whole log's band."""
    import os

    f, ax = plt.subplots(figsize=(10, 5), constrained_layout=True)
    mins = [m for m in fig.minutes if m.get("rate_s_per_day") is not None]
    if mins:  # each at the middle of the part of its minute the log covers
        ax.plot([_within(fig, m["minute"] * 60.0, 60.0) / per for m in mins], [m["rate_s_per_day"] for m in mins],
                ".", ms=2, color="0.6", label="per minute")
    hrs = [h for h in fig.hourly if h["rate_s_per_day"] is not None]
    if hrs:
        ax.errorbar([h["center_s"] / per for h in hrs], [h["rate_s_per_day"] for h in hrs],
                    yerr=[h["rate_ci95_s_per_day"] for h in hrs], fmt="o", ms=4, capsize=3, color="tab:blue",
                    label="per hour, 95 % interval")
    if fig.rate is not None:
        r = fig.rate
        ax.axhspan(r.rate_s_per_day - r.ci95_s_per_day, r.rate_s_per_day + r.ci95_s_per_day, color="tab:green",
                   alpha=0.2, lw=0, label=f"whole log {r.rate_s_per_day:+.3f} ± {r.ci95_s_per_day:.3f} s/day")
        if hrs:  # keep the per-minute scatter from hiding the hourly picture
            lo = min(h["rate_s_per_day"] - h["rate_ci95_s_per_day"] for h in hrs)
            hi = max(h["rate_s_per_day"] + h["rate_ci95_s_per_day"] for h in hrs)
            pad = max(hi - lo, 0.02) * 1.5
            ax.set_ylim(lo - pad, hi + pad)
    _mark_anomalies(ax, fig, 1 / per)
    return _finish_timeline(plt, f, ax, fig, os.path.join(out_dir, "rate.png"), ylabel="rate (s/day, + gains)",
                                  title=f"{title}: rate over time")


def _log_time_error(plt, fig, out_dir: str, title: str, per: float) -> str:
    """The time interval error as it accumulates, and what the rate line leaves of it."""
    import os

    f, (ax, ax2) = plt.subplots(2, 1, figsize=(10, 7), constrained_layout=True, sharex=True)
    if len(fig.step_x):
        big = np.ptp(fig.step_x) >= 1e-3  # ms for a millisecond or more, else µs
        ax.plot(fig.step_t / per, fig.step_x * (1e3 if big else 1e6), "-", lw=1, color="tab:blue")
        k = fig.step_k.astype(np.float64)
        A = np.vstack([np.ones(len(k)), k - k.mean()]).T
        coef, *_ = np.linalg.lstsq(A, fig.step_x, rcond=None)
        ax2.plot(fig.step_t / per, (fig.step_x - A @ coef) * 1e6, ".", ms=1.5, color="tab:blue")
    ax.set_ylabel(f"time interval error ({'ms' if len(fig.step_x) and np.ptp(fig.step_x) >= 1e-3 else 'µs'}, − = ahead)")
    ax.set_title(f"{title}: time error against the audio clock" + (" (corrected)" if fig.clock_correction_ppm is not None else ""))
    ax.grid(alpha=0.3)
    _shade_gaps(ax, fig, 1 / per)
    _mark_anomalies(ax, fig, 1 / per)
    if len(fig.missed_times_s) or len(fig.failed_times_s):
        ax.legend(loc="best", fontsize=8)
    _mark_anomalies(ax2, fig, 1 / per)
    return _finish_timeline(plt, f, ax2, fig, os.path.join(out_dir, "tie.png"),
                                  ylabel="after the rate line (µs)", title="what the rate line does not explain: "
                                  "a bow is a drifting rate, a sawtooth logic regulation", legend=False)


def _log_adev(plt, fig, out_dir: str, title: str, per: float) -> str:
    """The overlapping Allan deviation with its 95 % interval."""
    import os

    f, ax = plt.subplots(figsize=(7, 5.5), constrained_layout=True)
    ad = fig.adev
    if ad is not None and len(ad.tau_s):
        ax.errorbar(ad.tau_s, ad.deviation, yerr=[ad.deviation - ad.lower, ad.upper - ad.deviation], fmt="o-",
                    ms=4, capsize=3, color="tab:blue", label="overlapping ADEV, 95 % interval")
        ax.set_xscale("log")
        ax.set_yscale("log")
        sec = ax.secondary_yaxis("right", functions=(lambda y: y * SECONDS_PER_DAY, lambda y: y / SECONDS_PER_DAY))
        sec.set_ylabel("as s/day")
        ax.legend(loc="best", fontsize=8)
    ax.set_xlabel("averaging time τ (s)")
    ax.set_ylabel("Allan deviation σy(τ)")
    ax.set_title(f"{title}: stability")
    ax.grid(alpha=0.3, which="both")
    path = os.path.join(out_dir, "adev.png")
    _save(plt, f, path)
    return path


def _log_ringdown(plt, fig, out_dir: str, title: str, per: float) -> str:
    """The ring-down decay of each polarity hour by hour."""
    import os

    f, ax = plt.subplots(figsize=(10, 5), constrained_layout=True)
    centre = {h["hour"]: h["center_s"] for h in fig.hourly}
    for name, c in (("A", "tab:green"), ("B", "tab:orange")):
        rows = [r for r in fig.ringdown_hourly if r.get(name)]
        if not rows:
            continue
        # each hour at the mean time of its steps, kept inside the part of the hour the log covers
        x = np.array([_within(fig, r["hour"] * 3600.0, 3600.0, centre.get(r["hour"])) for r in rows]) / per
        med = np.array([r[name]["median_ms"] for r in rows])
        q1, q3 = np.array([r[name]["q1_ms"] for r in rows]), np.array([r[name]["q3_ms"] for r in rows])
        ax.plot(x, med, "o-", ms=3, color=c, label=f"polarity {name}, hourly median")
        if len(rows) > 1:
            ax.fill_between(x, q1, q3, color=c, alpha=0.2, lw=0, label=f"polarity {name}, quartiles")
        else:  # one hour: a band of one point would not show
            ax.errorbar(x, med, yerr=[med - q1, q3 - med], fmt="none", capsize=4, color=c, alpha=0.6,
                        label=f"polarity {name}, quartiles")
    return _finish_timeline(plt, f, ax, fig, os.path.join(out_dir, "ringdown.png"),
                                  ylabel="ring-down decay τ (ms)", title=f"{title}: ring-down over time",
                                  legend=bool(fig.ringdown_hourly))


def _within(fig, start_s: float, length_s: float, at_s: float | None = None) -> float:
    """``at_s`` (default: the middle) of the part of [start, start + length) the log covers."""
    lo = max(start_s, fig.start_s)
    hi = max(lo, min(start_s + length_s, fig.start_s + fig.span_s))
    return 0.5 * (lo + hi) if at_s is None else min(max(at_s, lo), hi)
