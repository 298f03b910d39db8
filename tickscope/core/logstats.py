"""Figures of a long log: rate over time, time interval error, Allan deviation, gaps (pure).

Input: the log's segments (duck-typed records with ``id, source_kind, timeline_s, join_kind,
clock_ppm, clock_ppm_u95, step_interval_s, duration_s``) and its events as numpy columns
(see :meth:`tickscope.io.store.LogStore.events`).  Output: :class:`LogFigures`, the source
of the log report's JSON, text and plots.

Time bases.  Each segment's event times are on its own audio clock, starting at 0.  The
log's timeline places segment time 0 at ``timeline_s``: for a file replay that is the file
position (the same audio clock, so the segments join exactly, ``join_kind='exact'``); for a
device it is the host's wall clock at the first sample (``'wall'``).  A clock correction
of ``ppm`` converts audio seconds to true seconds by dividing by ``1 + ppm 1e-6``.

Step numbers.  The steps of a later segment are numbered on from the earlier ones by
extrapolating the line fitted to the last steps before the join and rounding.  A segment
joined by the wall clock starts a new *group*: its own intercept in the rate fit, its time
error continued from the previous group on the fitted rate (the phase across such a gap is
not observed), and no Allan-deviation term spans the join.  A replay resumed on the same
audio clock stays in its group, but it learned new templates whose time origin and A/B offset
can sit ~0.1 ms from the old ones: both are measured from local lines on either side of the
join and removed ("stitched").
"""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field

import numpy as np

from . import stability as stab
from .dsp import line_fit
from .logphase import polarity_offset_s, phase_figures
from .rate import fit_rate, level_shifts, stretch_weights
from .regulation import unseen_correction_ci95_s_per_day
from ..model import FLAG_BITS, KIND_CODES
from ..units import interval_from_rate

KIND_STEP, KIND_MISSED, KIND_FAILED, KIND_CORRECTION, KIND_REJECTED = (
    KIND_CODES[k] for k in ("step", "missed", "failed", "correction", "rejected"))
GOOD_MATCH = 0.6
LOW_MATCH_BIT = FLAG_BITS["low-match"] | FLAG_BITS["in-burst"]  # steps that do not time the grid
RINGDOWN_BIT = FLAG_BITS["ringdown"]
REJECT_SNR_DB = 10.0  # off-grid sounds this far over the floor are counted (as analyze does)


@dataclass
class LogFigures:
    segments: int
    duration_s: float  # time covered by audio (sum of segments)
    span_s: float  # first to last sample on the timeline (gaps included)
    nominal_s: float | None
    steps_detected: int
    missed_steps: int
    failed_steps: int
    correction_pulses: int
    rejected_events: int
    rate: object | None  # RateEstimate over the whole log
    clock_correction_ppm: float | None
    clock_ppm_u95: float
    groups: int
    gaps: list[tuple[float, float, str]]  # (start, end, kind) on the timeline
    hourly: list[dict]
    minutes: list[dict]
    adev: stab.AllanResult | None
    tie: stab.TieSummary | None
    worst_hour: dict | None
    best_stretch: dict | None
    missed_times_s: np.ndarray
    failed_times_s: np.ndarray
    rejected_times_s: np.ndarray
    notes: list[str] = field(default_factory=list)
    # arrays for plots: the timeline of good steps and their time error
    step_t: np.ndarray = field(default_factory=lambda: np.zeros(0))
    step_x: np.ndarray = field(default_factory=lambda: np.zeros(0))
    step_k: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    ringdown_hourly: list[dict] = field(default_factory=list)
    # every event on the log's timeline and its step number across segments (-1: none)
    event_t: np.ndarray = field(default_factory=lambda: np.zeros(0))
    event_k: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    event_pol: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))  # 0 A, 1 B, -1 none
    # for the report's screens (not in its JSON): where the log starts on its timeline, the time of
    # every step heard, and whether its last segment recorded an end (False: still logging, or killed)
    start_s: float = 0.0
    step_times_s: np.ndarray = field(default_factory=lambda: np.zeros(0))
    ended: bool = True


def _rate_allowing_unseen(k, t, nominal, *, quartz: bool = True, **kw):
    """:func:`~tickscope.core.rate.fit_rate`, with a quartz motor's interval widened while under two
    regulation periods, as ``analyze`` does: a stretch shorter than 4 minutes may not yet hold a
    logic-regulation correction (see :func:`~tickscope.core.regulation.unseen_correction_ci95_s_per_day`;
    an escapement has no such correction: ``quartz=False``)."""
    r = fit_rate(k, t, nominal, **kw)
    if not quartz:
        return r
    return dataclasses.replace(r, ci95_s_per_day=unseen_correction_ci95_s_per_day(r.ci95_s_per_day, r.span_s))


def _timeline(s, t, override_ppm: float | None):
    """Audio time(s) of segment ``s`` on the log's timeline, corrected for the device clock."""
    ppm = override_ppm if override_ppm is not None else (s.clock_ppm or 0.0)
    c = 1.0 / (1.0 + ppm * 1e-6)
    return (s.timeline_s + t) * c if s.source_kind == "file" else s.timeline_s + t * c


def number_steps(segments, ev: dict[str, np.ndarray], nominal_s: float,
                 override_ppm: float | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str]]:
    """Timeline times, global step numbers and group ids for every event.

    Returns ``(T, K, G, notes)``; K is -1 for events without a step number.
    """
    T = np.zeros(len(ev["time_s"]))
    K = np.full(len(T), -1, dtype=np.int64)
    G = np.zeros(len(T), dtype=np.int64)
    notes: list[str] = []
    prev_k = prev_t = None
    group = 0
    group_pol = 0.0  # A/B offset of the group's first segment
    for i, s in enumerate(segments):
        sel = ev["seg"] == s.id
        idx = np.flatnonzero(sel)
        T[sel] = _timeline(s, ev["time_s"][sel], override_ppm)
        k = ev["step"][sel].copy()
        has = k >= 0
        steps = has & (ev["kind"][sel] == KIND_STEP) & (ev["match"][sel] >= GOOD_MATCH) & ((ev["flags"][sel] & LOW_MATCH_BIT) == 0)
        stitch = i > 0 and s.join_kind == "exact" and prev_k is not None and steps.sum() >= 20
        if i > 0 and not stitch:
            group += 1  # joined by the wall clock (or too short to stitch): its own intercept
        G[sel] = group
        if has.any():
            if prev_k is not None and steps.any():
                b, a = line_fit(prev_k, prev_t)
                j = int(np.flatnonzero(steps)[0])
                guess = (T[sel][j] - a) / b
                k0 = int(round(guess))
                if abs(guess - k0) > 0.25:
                    notes.append(f"segment {s.id}: its steps could not be numbered on from the last segment "
                                 f"(off by {guess - k0:+.2f} steps); they start a new stretch")
                    if stitch:
                        group += 1
                        G[sel] = group
                        stitch = False
                k = np.where(has, k - k[j] + k0, -1)
            elif prev_k is not None:
                k = np.where(has, k - k[has][0] + int(prev_k[-1]) + 1, -1)
            K[sel] = k
            kc = K[sel][steps]
            pol = polarity_offset_s(kc, T[sel][steps], np.zeros(len(kc), dtype=np.int64))
            if stitch:
                # A replay resumed on the same audio clock: the phase runs on, but the new segment
                # learned new templates, whose time origin (and A/B offset) can sit ~0.1 ms from the
                # old ones.  Align both to the group's, from local lines on either side of the join.
                shift = np.where(K[sel] >= 0, (pol - group_pol) * ((K[sel] % 2) - 0.5), 0.0)
                T[idx] -= shift
                tc = T[sel][steps]
                corr = lambda kk: group_pol * ((kk % 2) - 0.5)  # noqa: E731
                pk, pt = prev_k[-60:], prev_t[-60:]
                b1, a1 = line_fit(pk, pt - corr(pk))
                k2, t2 = kc[:60].astype(np.float64), tc[:60]
                b2, a2 = line_fit(k2, t2 - corr(k2))
                mid = 0.5 * (pk[-1] + k2[0])
                jump = (a2 + b2 * mid) - (a1 + b1 * mid)
                T[idx] -= jump
                if abs(jump) > 20e-6:
                    notes.append(f"segment {s.id} resumed the same recording; its timing origin sat "
                                 f"{jump * 1e6:+.0f} µs from the last segment's and was aligned to it")
            else:
                group_pol = pol  # a new group: its first segment sets the A/B offset
            if steps.any():
                ks, ts = K[sel][steps], T[sel][steps]
                prev_k, prev_t = ks[-600:].astype(np.float64), ts[-600:]
    return T, K, G, notes


def polarity_on_log(segments, ev: dict[str, np.ndarray], K: np.ndarray) -> tuple[np.ndarray, list[int]]:
    """The log's A/B name of every event (0 A, 1 B, -1 none) and the segments that were renamed.

    Each segment names its polarities from its own first step, so after a restart the names can
    swap.  The coil's polarity alternates with every step, so the log's step number (numbered on
    across segments) names them once for the whole log: the parity of K, as in the first
    segment.  A segment whose steps could not be numbered on from the one before keeps its own
    names (the parity across it is unknown).
    """
    P = ev["pol"].copy()
    renamed: list[int] = []
    numbered = (K >= 0) & (P >= 0)
    steps = numbered & (ev["kind"] == KIND_STEP)
    if not steps.any():
        return P, renamed
    # the first segment's names define the log's: K parity equals its own labels there
    first = int(np.flatnonzero(steps)[0])
    flip0 = int((K[first] % 2) != P[first])
    for s in segments:
        sel = steps & (ev["seg"] == s.id)
        if not sel.any():
            continue
        mism = float(np.mean(((K[sel] + flip0) % 2) != P[sel]))
        if mism > 0.5:
            renamed.append(s.id)
    P[numbered] = (K[numbered] + flip0) % 2
    return P, renamed


def log_figures(segments, ev: dict[str, np.ndarray], *, gaps=(), minutes=(), override_ppm: float | None = None,
                override_u95: float = 0.0, sounds: dict | None = None, lossy=frozenset()) -> LogFigures:
    """Everything the log report shows (see module docstring).

    ``sounds``: per segment id, what its sound was as analyze would call it (recorded when the
    segment ended); segments whose sound was not a stepping motor hold beats, not steps.
    ``lossy``: ids of segments replayed from a lossy file; when every step comes from one, the
    overall rate is fitted within the stretches between a codec's abrupt shifts of the step times
    (``rate.level_shifts``, weighted by ``rate.stretch_weights``), as analyze fits such a file.
    """
    segments = list(segments)
    sounds = sounds or {}
    beats_only = [s for s in segments if (sounds.get(s.id) or {}).get("sound") in ("not-stepping", "escapement", "not-ticking")]
    all_beats = bool(beats_only) and len(beats_only) == len(segments)
    last = (sounds.get(segments[-1].id) or {}) if segments else {}  # the last segment's sound
    esc = last.get("escapement")
    escapement_log = (all_beats and esc is not None
                      and all((sounds.get(s.id) or {}).get("sound") == "escapement" for s in segments))
    if all_beats and not escapement_log:
        info = sounds[beats_only[-1].id]
        iv = info.get("beat_interval_s")
        why = info.get("why") or ("the sound is not a quartz stepping-motor pattern"
                                  + ("" if iv is None else f" (beat interval heard {iv:.4f} s)"))
        note = "the log holds beats, not quartz steps: " + why
        fig = _empty(segments, None, ev, gaps, minutes, note=note, steps=0)
        # an escapement's figures, as its last segment's end measured them
        fig.notes.extend(f"at the end of segment {beats_only[-1].id}: {line}" for line in info.get("reading") or ())
        return fig
    nominal = next((s.step_interval_s for s in segments if s.step_interval_s), None)
    if escapement_log:  # an escapement's beats, on the nominal beat its last segment measured against
        nominal = 3600.0 / float(esc["beats_per_hour"])
    kinds = ev["kind"]
    if nominal is None or not len(kinds):
        return _empty(segments, nominal, ev, gaps, minutes, note="no stepping pattern was heard in the log"
                      if _ended(segments) else "no stepping pattern has been logged yet")
    T, K, G, notes = number_steps(segments, ev, nominal, override_ppm)
    P, renamed = polarity_on_log(segments, ev, K)
    for sid in renamed:
        notes.append(f"segment {sid} named the two polarities the other way round (each segment names them "
                     f"from its own first step); its steps are shown under the log's names")
    silent, silences = _silences(ev, T, K, nominal)
    good = (kinds == KIND_STEP) & (ev["match"] >= GOOD_MATCH) & ((ev["flags"] & LOW_MATCH_BIT) == 0) & (K >= 0)
    steps_all = kinds == KIND_STEP
    calibrated, u95, clock_ppm = _clock_terms(segments, override_ppm, override_u95, notes)
    quartz = not escapement_log
    rate = _overall_rate(K, T, G, good, ev, nominal, lossy, u95 if calibrated else 0.0, notes, quartz=quartz)
    spans, gap_list = _spans_and_gaps(segments, gaps, silences, override_ppm)
    duration = _union_length([(a, b) for a, b, _ in spans])  # a resumed replay re-reads a little
    t_lo = min(a for a, _, _ in spans)
    t_hi = max(b for _, b, _ in spans)
    hourly, ring = _hourly(ev, T, K, G, P, good, silent, spans, t_lo, t_hi, nominal, u95 if calibrated else 0.0,
                           quartz=quartz)
    if escapement_log:
        lifted = _escapement_hours(hourly, T, K, P, good, ev["lift_ms"], esc, nominal, segments[-1].samplerate)
        notes.insert(0, f"the log holds an escapement's beats, {esc['beats_per_hour']:.0f} per hour "
                        f"({esc.get('nominal_source')}): its steps are beats, its rates are against that beat, and "
                        "each hour gives its beat asymmetry" + (
                            f" and the balance amplitude from its beats' lift times (lift angle "
                            f"{esc.get('lift_angle_deg'):g}°{'' if esc.get('lift_angle_given') else ', assumed'})"
                            if lifted else ""))
        notes.extend(f"at the end of segment {segments[-1].id}: {line}" for line in last.get("reading") or ())
    adev = tie = None
    step_t, step_x, step_k = np.zeros(0), np.zeros(0), np.zeros(0, dtype=np.int64)
    if rate is not None:
        adev, tie, step_t, step_x, step_k = phase_figures(K, T, G, good, nominal, rate.interval_s, notes)
    # missed / failed / rejected on the timeline
    missed_t = T[(kinds == KIND_MISSED) & ~silent]
    failed_t = T[kinds == KIND_FAILED]
    rej = (kinds == KIND_REJECTED) & (ev["snr_db"] >= REJECT_SNR_DB)
    rejected_t = T[rej]
    worst = _worst_hour(hourly, rate)
    best = _best_stretch(spans, gap_list, np.sort(np.concatenate([missed_t, failed_t])), K, T, G, good, nominal, u95,
                         calibrated, quartz=quartz)
    return LogFigures(
        segments=len(segments), duration_s=duration, span_s=t_hi - t_lo, nominal_s=nominal,
        steps_detected=int(steps_all.sum()), missed_steps=int(len(missed_t)), failed_steps=int(len(failed_t)),
        correction_pulses=int(np.count_nonzero(kinds == KIND_CORRECTION)), rejected_events=int(rej.sum()),
        rate=rate, clock_correction_ppm=clock_ppm, clock_ppm_u95=u95 if calibrated else 0.0,
        groups=int(G.max()) + 1 if len(G) else 1, gaps=gap_list, hourly=hourly, minutes=_merge_minutes(minutes),
        adev=adev, tie=tie, worst_hour=worst, best_stretch=best, missed_times_s=missed_t, failed_times_s=failed_t,
        rejected_times_s=rejected_t, notes=notes, step_t=step_t, step_x=step_x, step_k=step_k, ringdown_hourly=ring,
        event_t=T, event_k=K, event_pol=P, start_s=t_lo, step_times_s=T[steps_all], ended=_ended(segments))


def _ended(segments) -> bool:
    """Whether the log's last segment recorded its end (a log still being written, or killed, has not)."""
    return not segments or getattr(segments[-1], "end_reason", None) is not None


def _clock_terms(segments, override_ppm, override_u95: float, notes: list[str]) -> tuple[bool, float, float | None]:
    """(all segments corrected, the 95 % half-width of the correction, the one correction or None)."""
    ppms = [override_ppm] if override_ppm is not None else [s.clock_ppm for s in segments]
    calibrated = all(p is not None for p in ppms)
    u95 = override_u95 if override_ppm is not None else max((s.clock_ppm_u95 or 0.0) for s in segments)
    clock_ppm = (ppms[0] if len(set(ppms)) == 1 else None) if calibrated else None
    if calibrated and clock_ppm is None:
        notes.append("segments carry different clock corrections: each segment is corrected by its own")
    return calibrated, u95, clock_ppm


def _overall_rate(K, T, G, good, ev, nominal: float, lossy, u95: float, notes: list[str], *, quartz: bool = True):
    """The rate over the whole log: a common slope, one intercept per group (None with too few steps)."""
    if good.sum() < 3 or np.ptp(K[good]) < 2:
        return None
    groups, weights = G[good], None
    if lossy and set(np.unique(ev["seg"][good]).tolist()) <= set(lossy):
        shifts = level_shifts(K[good], T[good])
        if shifts is not None:
            groups = np.unique(np.stack([G[good], shifts]), axis=1, return_inverse=True)[1].ravel()
            weights = stretch_weights(K[good], T[good], groups)
            notes.append(f"the audio went through a lossy codec, which shifted the step times abruptly "
                         f"{int(shifts.max())} time{'s' if shifts.max() > 1 else ''}: the overall rate is "
                         "fitted within the stretches between shifts")
    return _rate_allowing_unseen(K[good], T[good], nominal, quartz=quartz, clock_ppm=0.0, clock_ppm_u95=u95, groups=groups,
                                 weights=weights)


def _spans_and_gaps(segments, gaps, silences, override_ppm):
    """Each segment's span on the timeline, and every gap: between segments, restarts of a replay,
    the audio's own gaps and the silences."""
    spans = []
    for s in segments:
        spans.append((_timeline(s, 0.0, override_ppm), _timeline(s, s.duration_s, override_ppm), s))
    gap_list: list[tuple[float, float, str]] = []
    for (a0, b0, s0), (a1, b1, s1) in zip(spans[:-1], spans[1:]):
        if a1 > b0 + 1e-6:
            gap_list.append((b0, a1, "between segments"))
        elif s1.join_kind == "exact" and s0.source_kind == "file":
            gap_list.append((a1, a1, "restart"))  # a resumed replay: no audio lost, the analysis restarted
    by_id = {s.id: s for s in segments}
    for seg, g0, g1, kind in gaps:
        s = by_id.get(seg)
        a, b = (_timeline(s, g0, override_ppm), _timeline(s, g1, override_ppm)) if s is not None else (g0, g1)
        gap_list.append((a, b, kind or "overflow"))
    gap_list += silences
    gap_list.sort()
    return spans, gap_list


def _escapement_hours(hourly: list[dict], T: np.ndarray, K: np.ndarray, P: np.ndarray, good: np.ndarray,
                      lift_ms: np.ndarray, esc: dict, nominal_s: float, samplerate: float) -> bool:
    """Each hour's beat asymmetry (ms, with its 95 % half-width) from its well-matched beats (the
    sides by the log's beat numbers: which is tick cannot be told from the sound), and for a balance
    its amplitude (deg, with its 95 % half-width, or why none) from the beats' lift times as
    ``analyze`` gives it.  True when some hour has an amplitude."""
    from .escapement import BEAT_REFERENCE_ALLOWANCE_S, beat_asymmetry, lift_amplitude, side_lifts

    hour = np.floor(T / 3600.0).astype(np.int64)
    balance, la = bool(esc.get("balance")), esc.get("lift_angle_deg")
    any_amp = False
    for h in hourly:
        sel = good & (hour == h["hour"])
        got = beat_asymmetry(K[sel], T[sel]) if sel.sum() >= 8 else None
        h["beat_asymmetry_ms"] = None if got is None else round(got[0] * 1e3, 4)
        # (with the allowance for where the two sides' beats are timed, twice, as analyze's figure
        # has at the least: escapement.escapement_figures)
        h["beat_asymmetry_ci95_ms"] = None if got is None else round(
            math.hypot(got[1], 2.0 * BEAT_REFERENCE_ALLOWANCE_S) * 1e3, 4)
        if not balance or la is None:
            continue
        amp = ci = None
        why = "few-lifts"
        if np.isfinite(lift_ms[sel]).any():
            beat_s = interval_from_rate(nominal_s, h["rate_s_per_day"] or 0.0)
            amp, ci, why = lift_amplitude(side_lifts(lift_ms[sel], P[sel]), beat_s=beat_s,
                                          lift_angle_deg=float(la), samplerate=samplerate)
        h["amplitude_deg"] = None if amp is None else round(amp, 2)
        h["amplitude_ci95_deg"] = None if ci is None else round(ci, 2)
        h["amplitude_reason"] = why
        any_amp = any_amp or amp is not None
    return any_amp


def _hourly(ev, T, K, G, P, good, silent, spans, t_lo: float, t_hi: float, nominal: float, u95: float, *,
            quartz: bool = True):
    """Per hour of the timeline: rate, counts and coverage; and the ring-down per polarity."""
    kinds = ev["kind"]
    steps_all = kinds == KIND_STEP
    # hourly rates, counts and ring-down
    hourly, ring = [], []
    hour = np.floor(T / 3600.0).astype(np.int64)
    for h in range(int(math.floor(t_lo / 3600)), int(math.floor(max(t_hi - 1e-9, t_lo) / 3600)) + 1):
        in_h = hour == h
        gh = good & in_h
        r = None
        if gh.sum() >= 6 and np.ptp(K[gh]) >= 5:
            r = _rate_allowing_unseen(K[gh], T[gh], nominal, quartz=quartz, clock_ppm=0.0, clock_ppm_u95=u95,
                         groups=G[gh])
        covered = sum(max(0.0, min(b, (h + 1) * 3600) - max(a, h * 3600)) for a, b, _ in spans)
        hourly.append({"hour": h, "start_s": h * 3600.0, "covered_s": round(covered, 3),
                       "center_s": float(np.mean(T[gh])) if gh.any() else h * 3600.0 + 1800.0,
                       "steps": int(np.count_nonzero(steps_all & in_h)),
                       "missed": int(np.count_nonzero((kinds == KIND_MISSED) & in_h & ~silent)),
                       "failed": int(np.count_nonzero((kinds == KIND_FAILED) & in_h)),
                       "rejected": int(np.count_nonzero((kinds == KIND_REJECTED) & in_h & (ev["snr_db"] >= REJECT_SNR_DB))),
                       "rate_s_per_day": None if r is None else r.rate_s_per_day,
                       "rate_ci95_s_per_day": None if r is None else r.ci95_s_per_day,
                       "jitter_us": None if r is None else r.jitter_us})
        row = {"hour": h}
        for pol, name in ((0, "A"), (1, "B")):
            d = ev["decay_ms"][steps_all & in_h & (P == pol)]
            d = d[np.isfinite(d)]
            row[name] = None if not len(d) else {"median_ms": float(np.median(d)),
                                                 "q1_ms": float(np.percentile(d, 25)),
                                                 "q3_ms": float(np.percentile(d, 75)),
                                                 "abnormal": int(np.count_nonzero(
                                                     (ev["flags"][steps_all & in_h & (P == pol)] & RINGDOWN_BIT) != 0))}
        ring.append(row)
    return hourly, ring


SILENT_RUN = 10  # this many missed steps in a row are a silence (microphone moved, movement stopped)


def _silences(ev, T, K, nominal) -> tuple[np.ndarray, list[tuple[float, float, str]]]:
    """Missed steps that are really no sound: long runs, and every slot after a segment's last step.

    A stepping motor that misses steps misses single ones; ten or more in a row mean the sound
    was lost or the movement stopped, which the report shows as a stretch with no steps heard.
    """
    kinds = ev["kind"]
    silent = np.zeros(len(kinds), dtype=bool)
    out: list[tuple[float, float, str]] = []
    for seg in np.unique(ev["seg"]):
        sel = np.flatnonzero((ev["seg"] == seg) & ((kinds == KIND_MISSED) | (kinds == KIND_STEP)))
        if not len(sel):
            continue
        order = sel[np.argsort(K[sel], kind="stable")]
        miss = kinds[order] == KIND_MISSED
        i = 0
        n = len(order)
        while i < n:
            if not miss[i]:
                i += 1
                continue
            j = i
            while j + 1 < n and miss[j + 1] and K[order[j + 1]] == K[order[j]] + 1:
                j += 1
            trailing = j == n - 1
            if j - i + 1 >= SILENT_RUN or trailing:
                silent[order[i:j + 1]] = True
                out.append((float(T[order[i]]) - 0.5 * nominal, float(T[order[j]]) + 0.5 * nominal,
                            "steps stopped" if trailing else "no steps heard"))
            i = j + 1
    return silent, out


def _union_length(intervals) -> float:
    total, end = 0.0, -math.inf
    for a, b in sorted(intervals):
        if b > end:
            total += b - max(a, end)
            end = b
    return total


def _merge_minutes(rows) -> list[dict]:
    """One row per timeline minute (a minute split by a restart has two rows: keep the fuller)."""
    best: dict[int, dict] = {}
    for r in rows:
        m = int(r["minute"])
        if m not in best or (r.get("steps") or 0) > (best[m].get("steps") or 0):
            best[m] = dict(r)
    return [best[m] for m in sorted(best)]


def _worst_hour(hourly: list[dict], rate) -> dict | None:
    """The hour with the most missed and failed steps; with none, the one whose rate strays furthest."""
    if not hourly:
        return None
    bad = max(hourly, key=lambda h: h["missed"] + h["failed"])
    if bad["missed"] + bad["failed"] > 0:
        return {**bad, "why": f"{bad['missed']} missed and {bad['failed']} failed steps"}
    scored = [h for h in hourly if h["rate_s_per_day"] is not None and h["covered_s"] >= 1800]
    if not scored or rate is None:
        return None
    w = max(scored, key=lambda h: abs(h["rate_s_per_day"] - rate.rate_s_per_day)
            / max(h["rate_ci95_s_per_day"] or 1e-3, 1e-3))
    return {**w, "why": f"rate {w['rate_s_per_day'] - rate.rate_s_per_day:+.3f} s/day from the log's"}


def _best_stretch(spans, gaps, anomalies_t, K, T, G, good, nominal, u95, calibrated, *,
                  quartz: bool = True) -> dict | None:
    """The longest stretch with no missed or failed step and no gap, and its rate."""
    cuts = sorted([a for a, _, _ in spans] + [b for _, b, _ in spans] + [g[0] for g in gaps] + [g[1] for g in gaps]
                  + list(anomalies_t))
    best = None
    for a, b in zip(cuts[:-1], cuts[1:]):
        if b - a <= 0:
            continue
        inside = any(sa <= a + 1e-9 and b <= sb + 1e-9 for sa, sb, _ in spans) and not any(
            ga < b and gb > a and gb > ga for ga, gb, _ in gaps)
        if inside and (best is None or b - a > best[1] - best[0]):
            best = (a, b)
    if best is None:
        return None
    a, b = best
    sel = good & (T > a) & (T < b)
    r = None
    if sel.sum() >= 6 and np.ptp(K[sel]) >= 5:
        r = _rate_allowing_unseen(K[sel], T[sel], nominal, quartz=quartz, clock_ppm=0.0,
                                  clock_ppm_u95=u95 if calibrated else 0.0, groups=G[sel])
    return {"start_s": a, "end_s": b, "duration_s": b - a,
            "rate_s_per_day": None if r is None else r.rate_s_per_day,
            "rate_ci95_s_per_day": None if r is None else r.ci95_s_per_day}


def _empty(segments, nominal, ev, gaps, minutes, *, note: str,
           steps: int | None = None) -> LogFigures:
    z = np.zeros(0)
    dur = sum(s.duration_s for s in segments)
    if steps is None:
        steps = int(np.count_nonzero(ev["kind"] == KIND_STEP))
    return LogFigures(segments=len(segments), duration_s=dur, span_s=dur, nominal_s=nominal,
                      steps_detected=steps, missed_steps=0, failed_steps=0,
                      correction_pulses=0, rejected_events=0, rate=None, clock_correction_ppm=None, clock_ppm_u95=0.0,
                      groups=1, gaps=[], hourly=[], minutes=_merge_minutes(minutes), adev=None, tie=None,
                      worst_hour=None, best_stretch=None, missed_times_s=z, failed_times_s=z, rejected_times_s=z,
                      notes=[note], event_t=ev["time_s"], event_k=ev["step"],
                      event_pol=ev["pol"], step_times_s=ev["time_s"][ev["kind"] == KIND_STEP] if steps else z,
                      ended=_ended(segments))
