"""Plain data passed between the layers (frozen dataclasses, stdlib and numpy only)."""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


#: Step flags packed into a small integer (the analyzer's step columns, the log database).
FLAG_BITS = {"clipped": 1, "low-match": 2, "truncated": 4, "ringdown": 8, "bent-decay": 16}
#: Event kinds as stored in the log database.
KIND_CODES = {"step": 0, "missed": 1, "failed": 2, "correction": 3, "rejected": 4}


def flag_bits(flags) -> int:
    """Flags (names) to their bits."""
    v = 0
    for f in flags:
        v |= FLAG_BITS.get(f, 0)
    return v


def flag_names(bits: int) -> list[str]:
    """Bits back to flag names."""
    return [name for name, bit in FLAG_BITS.items() if bits & bit]


@dataclass(frozen=True)
class Block:
    """A block of mono audio and the index of its first sample in the stream.

    ``host_time_s``/``wall_time_s``/``adc_time_s`` are the host's clock readings for live
    capture (None for files); ``gap_before`` counts samples lost before this block
    (input overflow), which the pipeline must not mistake for missed steps.  ``scale``, when
    set, says the samples are integers (16- or 24-bit audio as read, int16 or int32) standing for
    their value times ``scale`` (:func:`samples_as_float32` gives their float values).
    """

    samples: np.ndarray
    start_sample: int
    host_time_s: float | None = None
    wall_time_s: float | None = None
    adc_time_s: float | None = None
    gap_before: int = 0
    scale: float | None = None


def samples_as_float32(x: np.ndarray, scale: float | None) -> np.ndarray:
    """Samples as float32: integers times their ``scale`` (a power of two: exact for 8-, 16- and
    24-bit audio, the values a file reader converting to float would give); float samples as they
    are.  The one place that conversion is written (reader, detector, analyzer)."""
    if scale is None:
        return np.asarray(x, dtype=np.float32)
    return np.multiply(x, np.float32(scale), dtype=np.float32)


@dataclass(frozen=True)
class Event:
    """One classified sound.

    kind: ``step`` (a motor step on the grid), ``secondary`` (a later impact of the same
    step's sound: hand bounce, backlash), ``rejected`` (off the step grid: knocks,
    voices, another clock) or ``missed`` (a grid slot with no sound; ``time_s`` is the
    predicted time).
    """

    kind: str
    time_s: float
    step: int | None = None
    polarity: str = ""
    peak_dbfs: float = float("nan")
    snr_db: float = float("nan")
    match: float = float("nan")  # correlation with the polarity's template (0..1)
    decay_ms: float = float("nan")
    flags: tuple[str, ...] = ()


@dataclass(frozen=True)
class RateEstimate:
    """Daily rate from a straight-line fit to step times."""

    rate_s_per_day: float
    ci95_s_per_day: float  # half-width of the 95 % interval
    interval_s: float  # fitted step interval on the device time base
    n_steps: int
    n_outliers: int
    span_s: float
    jitter_us: float  # RMS residual
    residual_correlation: float  # lag-1 autocorrelation of residuals
    clock_correction_ppm: float = 0.0
    polarity_offset_us: float = 0.0  # B steps sound this much later than the A-step line


@dataclass(frozen=True)
class RingDownStats:
    """Ring-down summary of one polarity."""

    polarity: str
    n: int
    decay_ms_median: float
    decay_ms_iqr: float
    n_abnormal: int
    n_bent: int = 0  # steps whose decay curve bends away from one exponential (reverberation, noise)


@dataclass(frozen=True)
class Summary:
    """Everything an analysis found (the source of every report)."""

    duration_s: float
    sample_rate_hz: float
    channel: int
    step_interval_s: float | None
    measured_interval_s: float | None
    sound: str  # "stepping" | "not-stepping" | "none"
    steps_detected: int
    missed_steps: int
    missed_step_times_s: list[float]
    rejected_events: int
    secondary_impacts: int
    rate: RateEstimate | None
    ringdown: dict[str, RingDownStats]
    step_snr_db: float
    clipped_steps: int
    hum_hz: float | None
    hum_db: float | None
    dc_offset: float
    peak_dbfs: float
    warnings: list[str] = field(default_factory=list)
    residuals_us: np.ndarray | None = None  # per accepted step, for charts
    residual_times_s: np.ndarray | None = None
    extras: dict = field(default_factory=dict)
