"""PNG figures (matplotlib, imported only here)."""
from __future__ import annotations

import numpy as np

from ..errors import ParameterError


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
    fig, axes = plt.subplots(2, 1, figsize=(9, 6.5), constrained_layout=True)
    ax = axes[0]
    if summary.residuals_us is not None and len(summary.residuals_us):
        ax.plot(summary.residual_times_s, summary.residuals_us, ".", ms=3, color="tab:blue")
        for t in summary.missed_step_times_s:
            ax.axvline(t, color="tab:red", lw=0.8, alpha=0.6)
    ax.set_xlabel("time in recording (s)")
    ax.set_ylabel("timing residual (µs)")
    r = summary.rate
    ax.set_title(f"{title}: " + (f"rate {r.rate_s_per_day:+.4f} ± {r.ci95_s_per_day:.4f} s/day (95 %)" if r else "no rate"))
    ax.grid(alpha=0.3)
    ax = axes[1]
    t = analyzer.step_t.values
    d = analyzer.step_decay.values
    pol = analyzer.step_pol.values
    for p, name, c in ((0, "A", "tab:green"), (1, "B", "tab:orange")):
        sel = (pol == p) & np.isfinite(d)
        ax.plot(t[sel], d[sel], ".", ms=3, color=c, label=f"polarity {name}")
    ax.set_xlabel("time in recording (s)")
    ax.set_ylabel("ring-down decay τ (ms)")
    ax.legend(loc="upper right")
    ax.grid(alpha=0.3)
    try:
        fig.savefig(path, dpi=110)
    except OSError as e:
        raise ParameterError(f"cannot write {path}: {e.strerror}") from e
    finally:
        plt.close(fig)
