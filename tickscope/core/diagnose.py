"""The quartz diagnostics of a stepping recording, from the analyzer's step record (pure).

:func:`diagnose` runs every diagnosis over the steps so far and returns one frozen
:class:`~tickscope.model.Diagnosis`: the rate over whole logic-regulation periods (or widened
for a correction not yet heard), end-of-life bursts, another clock, failed steps and their
cost, adaptive drive levels, anomalies locked to a wheel's position, and the polarity
asymmetry.  The detectors themselves live in :mod:`.regulation`, :mod:`.faults` and
:mod:`.otherclock`; the words for them in :mod:`tickscope.advice`.
"""
from __future__ import annotations

import dataclasses
import math

import numpy as np

from ..model import FLAG_BITS, Bursts, Diagnosis, FailedSteps, PolarityAsymmetry, RateEstimate, StepArrays
from ..units import rate_from_interval, SECONDS_PER_DAY
from .faults import burst_share, drive_level_test, polarity_asymmetry, position_locked
from .otherclock import other_clock
from .regulation import LONGEST_KNOWN_PERIOD_S, detect_inhibition, unseen_correction_ci95_s_per_day

#: Each polarity is timed from the arrival of its impulse (timing.first_arrival); the two
#: sounds' rises can still differ a little, which the reference's own half-width accounts for.
#: A difference is called uneven stepping when it is significant (beyond its 95 % interval,
#: the reference's uncertainty included) and larger than this (us; our own margin: a rotor
#: off-centre in its detent shows hundreds of us, common practice, no source).
ASYMMETRY_FLOOR_US = 50.0
#: Above this half-width of the shared reference (us) the two polarities sound too different
#: to put on one reference: no uneven stepping is claimed.
ASYMMETRY_REFERENCE_MAX_US = 150.0
#: End-of-life bursts recognised at acquisition are reported when at least this share of the
#: bursts tracked held every one of their steps (a pattern seen by chance in the first slots
#: would leave the later slots with a step alone; later steps of a burst can still be lost to
#: noise, a polarity that sounds unlike the slot's: our own margin).
BURST_CONFIRM_SHARE = 0.4


def diagnose(rec: StepArrays, good: np.ndarray, rate: RateEstimate, nominal_s: float, *,
             bursts: Bursts | None = None, reference_u_s: float = 0.0, clock_ppm: float = 0.0,
             clock_ppm_u95: float = 0.0) -> Diagnosis:
    """Every quartz diagnosis over the step record.

    Parameters
    ----------
    rec : StepArrays
        The analyzer's record so far.
    good : np.ndarray [shape=(steps,), bool]
        Steps that match their template well enough to be timed (the rate fit's steps).
    rate : RateEstimate
        The line fit through the good steps.
    nominal_s : float
        The nominal step interval, s.
    bursts : Bursts or None
        The end-of-life stepping the tracker follows (its later steps are flagged ``in-burst``);
        reported when most of the bursts heard held all their steps.
    reference_u_s : float
        Uncertainty (s) of the shared time reference of the two polarities' sounds (the tracker's
        ``reference_u_s``); widens the polarity asymmetry's interval (twice: it moves one polarity).
    """
    k, t = rec.k[good], rec.t_s[good]
    if bursts is not None:
        # recognised at acquisition (every step of a burst in 70 % of the first slots, see
        # acquire._burst_pattern); confirmed when the record's bursts still hold all their steps
        share = burst_share(rec, bursts)
        bursts = dataclasses.replace(bursts, share_tracked=share) if share >= BURST_CONFIRM_SHARE else None
    inh = None if bursts else detect_inhibition(k, t, nominal_s, clock_ppm=clock_ppm, clock_ppm_u95=clock_ppm_u95)
    if inh is not None and math.isfinite(inh.regulated_rate_s_per_day):
        shown = dataclasses.replace(rate, rate_s_per_day=inh.regulated_rate_s_per_day,
                                    ci95_s_per_day=inh.regulated_ci95_s_per_day)
        provisional = inh.periods_observed < 2
    else:
        inh = None
        provisional = rate.span_s < 2 * LONGEST_KNOWN_PERIOD_S
        shown = rate
        if provisional:  # an unseen correction could still come: widen the interval by its largest usual size
            shown = dataclasses.replace(rate, ci95_s_per_day=unseen_correction_ci95_s_per_day(rate.ci95_s_per_day,
                                                                                              rate.span_s))
    oc = other_clock(rec.other_t_s, rec.other_peak_dbfs, rec.k, rec.t_s, rec.peak_dbfs)
    if oc is not None:
        oc = dataclasses.replace(oc, rate_s_per_day=rate_from_interval(nominal_s * (1.0 + clock_ppm * 1e-6),
                                                                       oc.interval_s))
    first = (rec.flags & FLAG_BITS["in-burst"]) == 0  # a burst's later steps share its slot's level
    levels, changes, level_p = drive_level_test(rec.peak_dbfs[first], rec.pol[first], rec.snr_db[first])
    return Diagnosis(
        rate=shown, rate_provisional=provisional, rate_ci95_statistical_s_per_day=rate.ci95_s_per_day,
        record_more_s=max(0.0, 2 * LONGEST_KNOWN_PERIOD_S - rate.span_s) if provisional else 0.0,
        inhibition=inh, bursts=bursts, steps_in_bursts=int(len(rec.k)) if bursts else None,
        other_clock=oc, failed=_failed(rec, nominal_s, rate.span_s),
        drive_levels=tuple(levels) if len(levels) >= 2 else (), drive_level_changes=changes,
        drive_level_p_value=level_p,
        position_locked=_position_locked(rec), asymmetry=_asymmetry(rec, k, t, 2e6 * reference_u_s))


def _failed(rec: StepArrays, nominal_s: float, span_s: float) -> FailedSteps:
    """Failed steps and their cost: 2 steps lost per uncorrected failure when the next slot is
    missed too (the next pulse finds the rotor aligned), 1 otherwise, none when corrected."""
    ck = set(int(v) for v in rec.correction_k)
    mk = set(int(v) for v in rec.missed_k)
    lost = sum(0 if int(x) in ck else (2 if int(x) + 1 in mk else 1) for x in rec.failed_k)
    return FailedSteps(count=int(len(rec.failed_k)), times_s=tuple(float(v) for v in rec.failed_t_s),
                       correction_pulses=len(ck), steps_lost=lost, seconds_lost=lost * nominal_s,
                       seconds_lost_per_day=lost * nominal_s / max(span_s, 1.0) * SECONDS_PER_DAY)


def _position_locked(rec: StepArrays):
    """Failed steps, correction pulses and abnormal ring-downs that repeat with a wheel's turn."""
    rk = rec.k[(rec.flags & FLAG_BITS["ringdown"]) != 0]
    anomalies = np.unique(np.concatenate([rec.failed_k, np.array(sorted(set(int(v) for v in rec.correction_k)),
                                                                  dtype=np.int64), rk]))
    span = int(rec.k.max() - rec.k.min()) if len(rec.k) else 0
    return position_locked(anomalies, span)


def _asymmetry(rec: StepArrays, k: np.ndarray, t: np.ndarray, reference_u95_us: float) -> PolarityAsymmetry | None:
    pa = polarity_asymmetry(k, t)
    if pa is None:
        return None
    d, p = rec.decay_ms, rec.pol
    a, b = d[(p == 0) & np.isfinite(d)], d[(p == 1) & np.isfinite(d)]
    rd = float(np.median(b) - np.median(a)) if len(a) >= 3 and len(b) >= 3 else None
    ci = math.hypot(pa[1], reference_u95_us)
    # significant: beyond 3.29 sigma (1.68 times the 95 % half-width: p < 0.001 two-sided, so that
    # a recording without any asymmetry seldom shows one)
    uneven = abs(pa[0]) > max(1.68 * ci, ASYMMETRY_FLOOR_US) and reference_u95_us <= ASYMMETRY_REFERENCE_MAX_US
    return PolarityAsymmetry(pa[0], ci, uneven, rd, reference_u95_us)
