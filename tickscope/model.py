"""Plain data passed between the layers (frozen dataclasses, stdlib and numpy only)."""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


#: Step flags packed into a small integer (the analyzer's step columns, the log database).
FLAG_BITS = {"clipped": 1, "low-match": 2, "truncated": 4, "ringdown": 8, "bent-decay": 16, "in-burst": 32}
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
    lift_ms: float = float("nan")  # an escapement's beat: from its first sound to its drop (nan: not resolved)


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
    # the coherent average of the polarity's steps (aligned by their sub-sample times)
    decay_ms: float = float("nan")  # its decay time tau (nan: too few steps, or not measurable)
    decay_ms_ci95: float = float("nan")  # half-width of tau's 95 % interval (jackknife over groups of steps)
    n_averaged: int = 0  # steps in the average
    average_bent: bool = False  # the average's decay curve bends away from one exponential
    average_range_db: float = 0.0  # dB of the average's decay curve the fit spans


@dataclass(frozen=True)
class StepArrays:
    """The analyzer's record of a stream so far, as read-only arrays (views; one row per event).

    Steps: grid number ``k``, time ``t_s``, polarity (0 = A, 1 = B), match, decay time, SNR,
    peak level and flag bits (the later steps of an end-of-life burst share their burst's ``k`` and
    carry the ``in-burst`` flag).  Beside them: missed, failed and correction slots and every sound
    that is not a step (``other_t_s``, ``other_peak_dbfs``: later impacts and rejected sounds).
    """

    k: np.ndarray
    t_s: np.ndarray
    pol: np.ndarray
    match: np.ndarray
    decay_ms: np.ndarray
    snr_db: np.ndarray
    peak_dbfs: np.ndarray
    flags: np.ndarray
    lift_ms: np.ndarray  # an escapement's lift time per beat (nan where not resolved)
    missed_k: np.ndarray
    missed_t_s: np.ndarray
    failed_k: np.ndarray
    failed_t_s: np.ndarray
    correction_k: np.ndarray
    other_t_s: np.ndarray
    other_peak_dbfs: np.ndarray


@dataclass(frozen=True)
class Inhibition:
    """Logic regulation found in the step times: once per period one interval is longer."""

    period_s: float
    period_steps: int
    correction_us: float
    correction_ci95_us: float
    pulses_32768: float
    pulses_8192: float
    crystal_rate_s_per_day: float
    regulated_rate_s_per_day: float
    regulated_ci95_s_per_day: float
    periods_observed: int
    z_score: float  # the normal deviate of the best hypothesis' own (uncorrected) p-value
    phase_step: int  # step number (mod period) whose interval carries the correction
    p_value: float = float("nan")  # the search's p-value, corrected for every period and phase tried
    hypotheses: int = 0  # (period, phase) pairs tried


@dataclass(frozen=True)
class Bursts:
    """End-of-life stepping: steps in groups."""

    steps_per_burst: int
    burst_period_s: float
    spacing_ms: float  # from a burst's first step to its second
    offsets_ms: tuple[float, ...] = ()  # from a burst's first step to each later one
    share_full: float = float("nan")  # of the bursts heard at acquisition, the share that held every step
    share_tracked: float = float("nan")  # of the bursts tracked, the share that held every step


@dataclass(frozen=True)
class DriveLevel:
    level_dbfs: float
    share: float
    steps: int


@dataclass(frozen=True)
class PositionLock:
    """Anomalies repeating at the same step of a wheel's turn."""

    period_steps: int
    positions: list[int]
    count: int
    p_value: float = float("nan")  # chance of one position collecting this many (corrected for every position)


@dataclass(frozen=True)
class OtherClock:
    """Another clock ticking in the recording, on a grid of its own."""

    interval_s: float  # its own tick interval, on the recording's time base
    ticks: int  # sounds that lie on its grid
    level_db: float  # median level of its ticks minus that of the steps
    drift_ms_per_min: float  # how fast its ticks move against the steps
    rate_s_per_day: float = float("nan")  # on the same time base as the movement's rate
    p_value: float = float("nan")  # chance of a vote this full among sounds at random phases (corrected)


@dataclass(frozen=True)
class FailedSteps:
    """Steps where the rotor only twitched, and what they cost."""

    count: int
    times_s: tuple[float, ...]
    correction_pulses: int  # failures recovered by a correction pulse
    steps_lost: int  # 2 per uncorrected failure whose next slot was missed too, else 1
    seconds_lost: float
    seconds_lost_per_day: float


@dataclass(frozen=True)
class PolarityAsymmetry:
    """Mean A->B interval minus mean B->A interval."""

    value_us: float
    ci95_us: float  # the timing's own half-width and the shared time reference's, combined
    uneven: bool  # significant, and beyond what timing the two sounds can leave
    ringdown_diff_ms: float | None  # B's median ring-down minus A's
    reference_u95_us: float = 0.0  # how well the two polarities' sounds share one time reference


@dataclass(frozen=True)
class Diagnosis:
    """The quartz diagnostics of a stepping recording (see :mod:`tickscope.core.diagnose`)."""

    rate: RateEstimate  # as reported: over whole regulation periods, or widened for an unseen one
    rate_provisional: bool
    rate_ci95_statistical_s_per_day: float  # the fit's own half-width
    record_more_s: float  # audio still needed for two whole regulation periods (0 when enough)
    inhibition: Inhibition | None
    bursts: Bursts | None
    steps_in_bursts: int | None
    other_clock: OtherClock | None
    failed: FailedSteps
    drive_levels: tuple[DriveLevel, ...]  # two or more, else empty
    drive_level_changes: int
    position_locked: PositionLock | None
    asymmetry: PolarityAsymmetry | None
    drive_level_p_value: float = float("nan")  # the largest level change's p-value (corrected)


@dataclass(frozen=True)
class BeatStats:
    """A regular beat that is not a stepping motor's: how it was heard."""

    heard: int  # grid slots holding a sound
    like_first: int  # of those, how many matched the sound of the first beats
    scatter_ms: float | None  # SD of each beat's first sound about the grid (each polarity's mean removed)
    alternation_ms: float | None  # mean A->B minus B->A interval (an escapement's tick and tock)


@dataclass(frozen=True)
class Knocking:
    """A sound late in the swing, beat after beat, at one delay: the impulse pin striking the
    outside of the fork's horn (an amplitude past the banking)."""

    beats: int  # beats with a sound at that delay
    of_beats: int  # beats looked at
    delay_ms: float  # from the beat's first sound
    p_value: float  # chance of as many sounds at one delay among the sounds heard off the beats


@dataclass(frozen=True)
class WheelPattern:
    """Beat times that repeat with the escape wheel's turn (every 2 x teeth beats)."""

    period_beats: int
    amplitude_us: float  # RMS of the repeating pattern
    p_value: float  # corrected for every period tried


@dataclass(frozen=True)
class Stop:
    """The beats stopped (and, where ``restarted``, began again)."""

    at_s: float
    for_s: float | None  # None: they did not come back within the recording
    restarted: bool


@dataclass(frozen=True)
class EscapementFigures:
    """What an escapement's beats tell (see :mod:`tickscope.core.escapement`).

    Sides: 0 is the side of the beat numbered 0 (called tick), 1 the other (tock); which swing of
    the balance each is cannot be told from the sound.  The beat asymmetry is the tick->tock
    interval minus the tock->tick interval; the lift time is from a beat's first sound to its drop.
    """

    beats_per_hour: float  # nominal: the rate is measured against it
    beats_per_hour_heard: float
    nominal_source: str  # given | series | nearest (off every series value)
    off_series_percent: float  # the beat rate heard over the nominal, minus one, in %
    balance: bool  # a balance's beat rate (else a pendulum's)
    beat_interval_s: float  # the mean beat heard (fitted)
    rate: RateEstimate | None  # against the nominal beat
    beat_asymmetry_ms: float | None
    beat_asymmetry_ci95_ms: float | None
    beat_asymmetry_percent: float | None  # of the mean beat
    beat_reference: str  # first-sound | main-sound: what each side's beats are timed at
    lift_time_ms: tuple[float | None, float | None]
    lift_time_ci95_ms: tuple[float | None, float | None]
    lifts_measured: tuple[int, int]
    lift_angle_deg: float | None
    lift_angle_given: bool
    amplitude_deg: float | None
    amplitude_ci95_deg: float | None
    amplitude_reason: str | None  # why there is no amplitude (a code; advice says it in words)
    beat_scatter_us: float | None  # RMS of the beats about the fitted line (each side's offset removed)
    knocking: Knocking | None
    wheel: WheelPattern | None
    stops: tuple[Stop, ...]
    missed_beats: int


#: The sounds of beats that are not a quartz motor's steps: nothing missed or failed is counted on
#: them (an escapement's beats are timed as such; other ticking gets no rate).
BEAT_SOUNDS = ("escapement", "not-ticking")


@dataclass(frozen=True)
class CaptureInfo:
    """How a live capture went."""

    device: str
    overflows: int
    dropped_frames: int
    wall_seconds: float
    ended: str


@dataclass(frozen=True)
class Summary:
    """Everything an analysis found (the source of every report)."""

    duration_s: float
    samplerate: float
    channel: int
    step_interval_s: float | None
    measured_interval_s: float | None
    sound: str  # "stepping" | "escapement" | "not-ticking" | "none"
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
    diagnosis: Diagnosis | None = None  # stepping recordings only
    reading: tuple[str, ...] = ()  # the repairer's reading: plain-words statements from the diagnosis
    beats: BeatStats | None = None  # only when the sound is not a stepping motor's
    sound_reason: str | None = None  # why the sound is not taken for steps
    alternation_us: float | None = None  # mean A->B minus B->A interval over all steps
    coherence: float = float("nan")  # how well the first impacts lined up on the grid (0..1)
    sounds_heard: int = 0  # impulsive sounds the detector found so far (steps or not)
    regrid_times_s: tuple[float, ...] = ()  # where the step grid was found again (what was followed before: not steps)
    second_pass: bool = False  # the steps were followed from the start on the grid a first pass ended on
    escapement: EscapementFigures | None = None  # an escapement's beats (sound == "escapement")
    # set by the command that made the summary
    clock_calibrated: bool = False
    time_base: str | None = None
    capture: CaptureInfo | None = None

    @property
    def rate_ci95_statistical_s_per_day(self) -> float | None:
        """The rate fit's own half-width (without an unseen regulation's term), when diagnosed."""
        return None if self.diagnosis is None else self.diagnosis.rate_ci95_statistical_s_per_day
