"""Finding the step grid: the interval, the steps' phase and the polarity templates.

From the impacts of the first seconds (:class:`OpenImpact` rows), :func:`find_grid` finds

1. the step interval: the longest period on which the impacts line up (a phase-coherence scan,
   like a Rayleigh test), multiplied up where only every m-th slot holds sound;
2. the nominal interval: the nearest interval quartz movements use, within a tolerance; near
   one, the steps are gathered on the nominal grid at the steps' own phase;
3. one step per slot, then again on the line fitted through those steps;
4. a template per polarity (even and odd steps) from those steps, and their fine times.

:class:`~tickscope.core.grid.StepTracker` calls it until a grid is found, then tracks it.
"""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from ..model import Bursts
from .detect import Impact
from .timing import COARSE_TIE, Template, coarse_lags, learn_template, match, match_many

if TYPE_CHECKING:
    from .trackconfig import TrackerConfig

#: Step intervals of quartz movements (s): 2^-k fractions of a second for stepping
#: sweep hands, and the PCA2002 output periods 1, 5, 10, 20, 30 s (NXP PCA2002
#: datasheet Rev. 8, Table 7) plus 2 s and 60 s (common practice), and 4 s: the end-of-life
#: burst period of the Philips PCA16xx ("bursts of 4 pulses are produced every 4 s").
QUARTZ_INTERVALS_S = (1 / 16, 1 / 8, 1 / 4, 1 / 2, 1.0, 2.0, 4.0, 5.0, 10.0, 20.0, 30.0, 60.0)



@dataclass
class OpenImpact:
    """An impact the tracker has not decided yet, with its best time so far."""

    imp: Impact
    t_s: float  # best time estimate (coarse until templates exist)
    slot: int | None = None
    match: float = float("nan")  # against the template of its slot's polarity
    match_any: float = float("nan")  # against either polarity's template
    lift_s: float = float("nan")  # an escapement's beat: from its first sound to its drop


def find_interval(times_s: np.ndarray, weights: np.ndarray | None = None, *,
                  min_s: float = 0.05, max_s: float | None = None,
                  max_impacts: int = 160) -> tuple[float, float, float] | None:
    """Longest period on which the impact times line up.

    Returns ``(interval_s, phase_s, coherence)`` or None.  The coherence of a period P is
    ``|sum w exp(2 pi i t / P)| / sum w``: 1 when every impact sits on the same phase.
    Fractions of the true interval (P/2, P/3 ...) line up too, so the longest period whose
    coherence is close to the best one is taken.
    """
    t = np.asarray(times_s, dtype=np.float64)
    if len(t) < 3:
        return None
    w = np.ones(len(t)) if weights is None else np.asarray(weights, dtype=np.float64)
    span = float(t[-1] - t[0])
    if span <= 0:
        return None
    max_s = min(max_s or span / 2, span / 2)
    if max_s <= min_s:
        return None
    if len(t) > max_impacts:  # the strongest impacts carry the pattern; the rest cost time
        top = np.sort(np.argsort(w)[-max_impacts:])
        t, w = t[top], w[top]
    tt = t - t[0]
    # relative resolution 5e-4 (0.05 %): phases drift at most ~0.2 cycles across 40 s at 50 ms
    step = 5e-4
    periods = np.exp(np.arange(math.log(min_s), math.log(max_s), step))
    coh = np.empty(len(periods))
    W = w.sum()
    for i in range(0, len(periods), 512):
        P = periods[i: i + 512]
        ph = np.exp(2j * np.pi * tt[None, :] / P[:, None])
        coh[i: i + 512] = np.abs(ph @ w) / W
    best = float(coh.max())
    if best <= 0:
        return None
    # local maxima close to the best; take the longest period among them
    good = np.flatnonzero(coh >= 0.8 * best)
    j = int(good[-1])
    # climb to the local maximum around j
    while j + 1 < len(coh) and coh[j + 1] >= coh[j]:
        j += 1
    while j - 1 >= 0 and coh[j - 1] > coh[j]:
        j -= 1
    P = float(periods[j])
    phase = float(np.angle(np.sum(w * np.exp(2j * np.pi * tt / P)))) / (2 * np.pi) * P
    return P, t[0] + phase % P, float(coh[j])


def _step_phase(t: np.ndarray, w: np.ndarray, P: float, sound_s: float) -> float:
    """Time of the steps' phase on a grid of interval P: the earliest strong cluster of impact phases.

    The impacts' phases modulo P are gathered in 1 ms bins (weights ``w``) and smoothed over
    +-4 ms (a few ms of drift across the window).  The strongest cluster may be a step's later
    impact (a bounce as loud as the step): the earliest cluster within ``sound_s`` before it
    that holds at least half its weight is the steps' first impact.
    """
    nb = max(16, min(20000, int(round(P / 0.001))))
    bw = P / nb
    ph = np.mod(t - t[0], P)
    hist = np.bincount(np.minimum((ph / bw).astype(np.int64), nb - 1), weights=w, minlength=nb)
    half = max(1, int(round(0.004 / bw)))
    ext = np.concatenate([hist[-half:], hist, hist[:half]])
    cs = np.concatenate([[0.0], np.cumsum(ext)])
    dens = cs[2 * half + 1:] - cs[: len(cs) - 2 * half - 1]  # circular box sum, one per bin
    top = int(np.argmax(dens))
    reach = int(round(min(sound_s, 0.45 * P) / bw))
    for j in range(reach, 0, -1):  # earliest first
        c = (top - j) % nb
        if dens[c] >= 0.5 * dens[top] and dens[c] >= dens[(c - 1) % nb] and dens[c] >= dens[(c + 1) % nb]:
            return float(t[0] + c * bw)
    return float(t[0] + top * bw)


def _grid_line(chosen: dict) -> tuple[np.ndarray, np.ndarray, float, float, np.ndarray]:
    """Slot numbers, times, the line t = a + b k through them (outliers left out) and which were kept."""
    ks = np.array(sorted(chosen))
    ts = np.array([chosen[k].t_s for k in ks])
    b, a = np.polyfit(ks, ts, 1)
    res = ts - (a + b * ks)
    keep = np.abs(res - np.median(res)) < max(0.005, 4 * np.median(np.abs(res - np.median(res))) + 1e-4)
    if keep.sum() >= 3:
        b, a = np.polyfit(ks[keep], ts[keep], 1)
    return ks, ts, float(a), float(b), keep


def _line_spread(chosen: dict) -> float:
    """Median absolute deviation (s) of the chosen impacts from the line through them."""
    ks = np.array(sorted(chosen), dtype=np.float64)
    ts = np.array([chosen[int(k)].t_s for k in ks])
    b, a = np.polyfit(ks, ts, 1)
    return float(np.median(np.abs(ts - (a + b * ks))))


def nominal_interval(measured_s: float, tolerance: float = 0.005) -> float | None:
    """The quartz step interval within ``tolerance`` (relative) of a measured one, or None."""
    for c in QUARTZ_INTERVALS_S:
        if abs(measured_s / c - 1) <= tolerance:
            return c
    return None




@dataclass(frozen=True)
class Grid:
    """A step grid found in the first impacts.

    ``a``, ``b``: the line ``t = a + b k`` with the first chosen step as slot 0 (refitted on the
    fine times when three or more matched well); ``fine_k``, ``fine_t_s``: those steps.
    """

    measured_s: float
    nominal_s: float | None
    coherence: float
    a: float
    b: float
    templates: dict[int, Template]
    fine_k: list[int]
    fine_t_s: list[float]
    bursts: Bursts | None = None  # end-of-life stepping: every slot holds a burst of steps
    # each side's offset from the line (s): an escapement far out of beat, whose beats the line runs
    # between (0, 0 where the two sides are heard on the line)
    side_offsets_s: tuple[float, float] = (0.0, 0.0)


def impact_weights(buf: list[OpenImpact]) -> np.ndarray:
    """How much each impact counts in the search: its SNR against the loud end, capped.

    Impacts that stand far above the noise floor count most (the level alone can mislead: a
    phone's gain control lifts the noise between steps to the steps' level).  A sound out of
    digital silence stands 200 dB over its "floor" (the detector's floor has not yet risen to
    the room's noise): each impact's floor is taken no lower than the median floor of the
    window, and the SNR is capped at 60 dB.  Behind a noise gate every sound rises out of
    digital silence: the floor is also taken no lower than 50 dB under the loud end, so that a
    second clock 12 dB down stands 12 dB less far above it than the movement (both would
    otherwise pass any cap and weigh the same).  Weights are relative to the loud end (90th
    percentile: the steps, while they are a tenth of the sounds or more), so the faint noise
    impacts of a quiet room -- several a second at 8 kHz, four for every step -- weigh little;
    capped so that no single knock dominates.
    """
    snr = np.array([o.imp.frame_snr_db for o in buf])
    peak = np.array([o.imp.peak_dbfs for o in buf])
    floor = np.maximum(np.maximum(peak - snr, np.median(peak - snr)), np.percentile(peak, 90) - 50.0)
    snr = np.minimum(peak - floor, 60.0)
    return np.clip(10 ** ((snr - np.percentile(snr, 90)) / 10), 0.02, 2.0)


def _grow_period(t: np.ndarray, w: np.ndarray, P: float, phase: float) -> tuple[float, float]:
    """A fraction of the true interval lines up too; if only every m-th slot of the grid holds
    sound (m = 2, 3 or 5; the others (nearly) empty), the interval is m times as long."""
    for _ in range(4):
        kk = np.round((t - phase) / P).astype(np.int64)
        near = np.abs(t - (phase + kk * P)) <= 0.3 * P  # wide: the phase may be pulled by a bounce
        grown = False
        for m in (2, 3, 5):
            if t[-1] - t[0] < 2 * m * P:
                continue
            cw = np.array([float(np.sum(w[near & (kk % m == c)])) for c in range(m)])
            c_best = int(np.argmax(cw))
            if np.all(np.delete(cw, c_best) < 0.2 * cw[c_best]):
                phase += c_best * P
                P *= m
                grown = True
                break
        if not grown:
            break
    return P, phase


def find_grid(buf: list[OpenImpact], cfg: "TrackerConfig", samplerate: float, pre: int) -> Grid | None:
    """The step grid of the impacts in ``buf`` (time order), or None when they hold none."""
    if len(buf) < 3:
        return None
    t = np.array([o.t_s for o in buf])
    w = impact_weights(buf)
    found = find_interval(t, w)
    if found is None or found[2] < cfg.min_coherence:
        return None
    P, phase, coh = found
    P, phase = _grow_period(t, w, P, phase)
    # The coherence peak is broad over a few seconds, and its phase is a weighted mean over
    # everything that repeats with the step (a bounce, a burst, a phone's gain pumping, a second
    # clock at nearly the same rate): the interval can be skewed by tenths of a percent and the
    # phase by tens of ms.  A quartz movement (and the recording's clock) runs within a few
    # hundred ppm of its nominal interval, so near one (2 %, our own margin: gain pumping has skewed the peak
    # by 0.7 %; the line fitted through the steps must still land within the nominal tolerance
    # below) the steps are gathered on the nominal grid at their own phase (see _step_phase).
    nom = nominal_interval(P, 4 * cfg.nominal_tolerance)
    if nom is not None:
        P = nom
    tol = min(0.2 * P, 0.06)
    if nom is not None:
        phase = _step_phase(t, w, P, cfg.cluster_s if P < 1.5 else cfg.burst_cluster_s)
        back = tol
    else:
        # the slot's first sound may lie well before the coherence phase (bursts)
        back = min(0.25 * P, 0.35) if P >= 1.5 else tol
    # one step per slot (see _pick_steps), then again on the line fitted through those steps
    chosen = _pick_steps(buf, phase, P, back, tol)
    if len(chosen) < 3:
        return None
    ks, ts, a, b, keep = _grid_line(chosen)
    refined = _pick_steps(buf, a, b, tol, tol)
    if len(refined) >= 3:
        chosen = refined
        ks, ts, a, b, keep = _grid_line(chosen)
    sides = (0.0, 0.0)
    # An escapement far out of beat: its two intervals too unlike for one grid.  Either the grid is
    # on two beats (at no quartz interval), or it is on one beat with only every other slot's sound
    # on its line (any interval: a 3600 per hour pendulum's beat is a quartz motor's second); the
    # other beat then sounds at one place in every two-beat slot.
    parity = np.array([k % 2 for k in chosen])
    one_side = len(chosen) >= 6 and max(parity.mean(), 1 - parity.mean()) >= 0.8
    if one_side:
        p0 = int(round(parity.mean()))
        two = {k // 2: o for k, o in chosen.items() if k % 2 == p0}
        f = _other_beat(buf, w, two, a + p0 * b, 2 * b)
        if f is not None:
            chosen, ks, ts, a, b, keep, sides = _split_beats(buf, two, a + p0 * b, 2 * b, f)
    elif nom is None:
        f = _other_beat(buf, w, chosen, a, b)
        if f is not None:
            chosen, ks, ts, a, b, keep, sides = _split_beats(buf, chosen, a, b, f)
        else:  # a grid on one beat whose two sides sound at places of their own
            d = _side_places(buf, w, a, b)
            if d is not None:
                tol = min(0.1 * b, 0.03)
                picks = [_pick_steps(buf, a + d[p] + p * b, 2 * b, tol, tol) for p in (0, 1)]
                chosen, ks, ts, a, b, keep, sides = _two_sides(picks)
    k0 = int(ks[0])
    templates = _learn_templates(chosen, ks[keep] if keep.sum() >= 3 else ks, k0, cfg, samplerate, pre)
    fine_k, fine_t = _fine_times(chosen, ks, k0, templates, cfg, samplerate)
    line_a, line_b = a + b * k0, b
    if k0 % 2 == 1:  # the sides by the grid's numbers (from k0)
        sides = (sides[1], sides[0])
    if len(fine_k) >= 3 and sides == (0.0, 0.0):  # refit the grid on the fine times
        line_b, line_a = np.polyfit(fine_k, fine_t, 1)
    elif len(fine_k) >= 6:  # with each side's offset
        fk = np.asarray(fine_k, dtype=np.float64)
        odd = (np.asarray(fine_k) % 2 == 1).astype(np.float64)
        if 0 < odd.sum() < len(odd):
            A = np.column_stack([np.ones_like(fk), fk, odd - 0.5])
            (line_a, line_b, c), *_ = np.linalg.lstsq(A, np.asarray(fine_t), rcond=None)
            sides = (-0.5 * float(c), 0.5 * float(c))  # by the grid's numbers (from k0)
    nominal = nominal_interval(b, cfg.nominal_tolerance)
    bursts = _burst_pattern(buf, [chosen[int(k)] for k in ks], templates, nominal, cfg, samplerate) if nominal else None
    return Grid(measured_s=float(b), nominal_s=nominal, coherence=coh, a=line_a, b=line_b, templates=templates,
                fine_k=fine_k, fine_t_s=fine_t, bursts=bursts, side_offsets_s=sides)


#: The other beat of an escapement far out of beat: a sound at one place of the slot, away from the
#: slot's own sound (between these shares of the slot) ...
OTHER_BEAT_SHARE = (0.25, 0.75)  # out of beat by up to 50 %
#: ... in this share of the slots at least, within this share of the slot of one place ...
OTHER_BEAT_SLOTS = 0.6
OTHER_BEAT_WIDTH = 0.03
#: ... and loud (its median weight at least this share of the slots' own sounds': 13 dB under them;
#: our own margin)
OTHER_BEAT_WEIGHT = 0.05


def _other_beat(buf: list[OpenImpact], w: np.ndarray, chosen: dict, a: float, b: float) -> float | None:
    """Where in each slot of the line ``a + b k`` another beat sounds (a share of b), or None."""
    t = np.array([o.t_s for o in buf])
    f = np.mod((t - a) / b, 1.0)
    k = np.floor((t - a) / b).astype(np.int64)
    lo, hi = OTHER_BEAT_SHARE
    cand = (f > lo) & (f < hi)
    if cand.sum() < 3:
        return None
    nb = 100
    hist = np.bincount(np.minimum((f[cand] * nb).astype(np.int64), nb - 1), weights=w[cand], minlength=nb)
    wid = max(1, int(round(OTHER_BEAT_WIDTH * nb)))
    dens = np.convolve(hist, np.ones(2 * wid + 1), mode="same")
    c = (int(np.argmax(dens)) + 0.5) / nb
    near = cand & (np.abs(f - c) <= OTHER_BEAT_WIDTH)
    slots = np.unique(k[near])
    span = max(chosen) - min(chosen) + 1
    if len(slots) < max(3, OTHER_BEAT_SLOTS * span):
        return None
    main_w = np.median(impact_weights(list(chosen.values()))) if len(chosen) >= 3 else 0.0
    # the loudest sound of each slot near that place, against the slots' own sounds
    best = {}
    for i in np.flatnonzero(near):
        best[k[i]] = max(best.get(k[i], 0.0), float(w[i]))
    if np.median(list(best.values())) < OTHER_BEAT_WEIGHT * min(main_w, float(np.median(w))):
        return None
    return float(np.average(f[near], weights=w[near]))


#: Each side's place on a grid of one beat: the sides sound this far apart or more (s; a beat's
#: sound is timed within a few ms on either side: our own margin)
SIDES_APART_S = 0.010


def _side_places(buf: list[OpenImpact], w: np.ndarray, a: float, b: float) -> tuple[float, float] | None:
    """Where each side's sounds lie about the line ``a + b k`` (s), when the sides' places differ
    by SIDES_APART_S or more and each holds half its slots; else None."""
    t = np.array([o.t_s for o in buf])
    k = np.round((t - a) / b).astype(np.int64)
    r = t - (a + b * k)
    near = np.abs(r) <= 0.35 * b
    bw = 0.002
    nb = int(np.ceil(0.7 * b / bw)) + 1
    out = []
    for p in (0, 1):
        sel = near & (k % 2 == p)
        if sel.sum() < 3:
            return None
        hist = np.bincount(((r[sel] + 0.35 * b) / bw).astype(np.int64), weights=w[sel], minlength=nb)[:nb]
        dens = np.convolve(hist, np.ones(3), mode="same")
        c = int(np.argmax(dens))
        d = -0.35 * b + (c + 0.5) * bw
        at = sel & (np.abs(r - d) <= 1.5 * bw)
        slots_p = np.unique(k[sel])
        if len(np.unique(k[at])) < 0.5 * len(slots_p):
            return None
        out.append(float(np.average(r[at], weights=w[at])))
    if abs(out[0] - out[1]) < SIDES_APART_S:
        return None
    return out[0], out[1]


def _split_beats(buf: list[OpenImpact], chosen: dict, a: float, b: float, f: float):
    """The slots of ``a + b k`` as two beats each (the slot's own sound, and the other at share f):
    (chosen, ks, ts, a, b, keep, side offsets) on the line through both, numbered 2k and 2k + 1."""
    tol = min(0.1 * b, 0.06)
    return _two_sides([chosen, _pick_steps(buf, a + f * b, b, tol, tol)])


def _two_sides(picks: list[dict]):
    """Two sides' beats (slot k of side p is beat 2k + p) on one line with each side's offset:
    (chosen, ks, ts, a, b, keep, side offsets)."""
    both = {2 * k: o for k, o in picks[0].items()}
    both.update({2 * k + 1: o for k, o in picks[1].items()})
    ks = np.array(sorted(both))
    ts = np.array([both[k].t_s for k in ks])
    odd = (ks % 2 == 1).astype(np.float64)
    A = np.column_stack([np.ones(len(ks)), ks.astype(np.float64), odd - 0.5])
    (a2, b2, c), *_ = np.linalg.lstsq(A, ts, rcond=None)
    res = ts - A @ np.array([a2, b2, c])
    keep = np.abs(res - np.median(res)) < max(0.005, 4 * np.median(np.abs(res - np.median(res))) + 1e-4)
    if keep.sum() >= 6:
        (a2, b2, c), *_ = np.linalg.lstsq(A[keep], ts[keep], rcond=None)
    return both, ks, ts, float(a2), float(b2), keep, (-0.5 * float(c), 0.5 * float(c))


#: End-of-life bursts: steps follow the burst's first within this window (s) ...
BURST_WINDOW_S = (0.012, 0.35)
#: ... each at the same offset in every burst, to within this (s, SD; our own margin: a circuit's
#: burst spacing is set by its counter)
BURST_OFFSET_SD_S = 0.004
#: ... in this share of the slots at least
BURST_SHARE = 0.7
#: ... roughly evenly spaced: the i-th later step within this share of the spacing (or 10 ms) of
#: i spacings (the counter spaces the pulses evenly; a rotor still moving from the last step
#: sounds its impact a few ms early or late; our own margin)
BURST_EVEN = 0.25


def _burst_pattern(buf: list[OpenImpact], steps: list[OpenImpact], templates: dict[int, Template],
                   interval_s: float, cfg: "TrackerConfig", samplerate: float) -> Bursts | None:
    """End-of-life stepping: every slot of a 2-4 s grid holds a burst of one-second steps.

    The circuit holds steps back and delivers n of them every n seconds (Philips PCA16xx: "bursts
    of 4 pulses are produced every 4 s"; two steps every 2 s is also documented in consumer watch
    manuals).  So a burst is: the slot's step, then n - 1 more sounds that match a step template
    well, at the same offsets in every slot, where n one-second steps make the grid's interval.

    A step's own later impacts (a hand's bounce, the rotor settling) recur at fixed offsets too
    and can match a template as well: the sounds after each slot's step that match well are
    gathered into clusters of one offset (within 4 ms) across slots; clusters heard in at least
    ``BURST_SHARE`` of the slots are candidates, and of the sets of n - 1 of them spaced roughly
    evenly (``BURST_EVEN``) the one that matches the templates best (and, on a near tie, is
    loudest: steps are the loudest sounds of a burst) is the burst.
    """
    if interval_s < 1.5 or len(steps) < 3:
        return None
    n = int(round(interval_s))
    if n < 2 or abs(interval_s / n - 1.0) > 0.02:
        return None
    lo, hi = BURST_WINDOW_S
    hi = min(hi, 0.6 * interval_s / n)
    max_lag = int(0.003 * samplerate)
    heard = []  # per slot: (offset s, match, peak dBFS relative to the slot's step) of sounds like a step
    for st in steps:
        later = [o for o in buf if st.t_s + lo < o.t_s <= st.t_s + hi]
        like = []
        for o in later:
            rho = max(match(o.imp.wsnippet, tm, max_lag=max_lag)[1] for tm in templates.values())
            if rho >= cfg.good_match:
                like.append((o.t_s - st.t_s, rho, o.imp.peak_dbfs - st.imp.peak_dbfs))
        heard.append(like)
    clusters = _offset_clusters(heard)
    need = BURST_SHARE * len(steps)
    cands = [c for c in clusters if c["slots"] >= need]
    if len(cands) < n - 1:
        return None
    import itertools

    best = None
    for combo in itertools.combinations(sorted(cands, key=lambda c: c["offset"]), n - 1):
        offs = np.array([c["offset"] for c in combo])
        spacing = offs[-1] / (n - 1)
        if np.any(np.abs(offs - spacing * np.arange(1, n)) > max(0.010, BURST_EVEN * spacing)):
            continue
        # the slots that held every sound of the set
        full = set.intersection(*(c["members"] for c in combo))
        if len(full) < need:
            continue
        score = sum(c["match"] for c in combo) + 0.005 * sum(c["level_db"] for c in combo)
        if best is None or score > best[0]:
            best = (score, combo, full)
    if best is None:
        return None
    _, combo, full = best
    per = np.array([[dict(c["by_slot"])[i] for c in combo] for i in sorted(full)])
    if np.any(np.std(per, axis=0) > BURST_OFFSET_SD_S):
        return None
    med = np.median(per, axis=0) * 1e3
    return Bursts(steps_per_burst=n, burst_period_s=float(interval_s), spacing_ms=float(med[0]),
                  offsets_ms=tuple(float(v) for v in med), share_full=float(len(full) / len(steps)))


def _offset_clusters(heard: list[list[tuple[float, float, float]]], width_s: float = 0.006) -> list[dict]:
    """The sounds after each slot's step, gathered by offset: each cluster holds at most one sound
    per slot (the best-matching within ``width_s`` of the cluster's first offset), with the slots
    it was heard in, its median offset, match and level."""
    items = sorted((off, rho, lv, i) for i, like in enumerate(heard) for off, rho, lv in like)
    clusters: list[dict] = []
    for off, rho, lv, i in items:
        c = clusters[-1] if clusters else None
        if c is None or off - c["first"] > width_s:
            c = dict(first=off, by_slot={})
            clusters.append(c)
        prev = c["by_slot"].get(i)
        if prev is None or rho > prev[1]:
            c["by_slot"][i] = (off, rho, lv)
    out = []
    for c in clusters:
        v = np.array(list(c["by_slot"].values()))
        out.append(dict(offset=float(np.median(v[:, 0])), match=float(np.median(v[:, 1])),
                        level_db=float(np.median(v[:, 2])), slots=len(v), members=set(c["by_slot"]),
                        by_slot={i: x[0] for i, x in c["by_slot"].items()}))
    return out


def _learn_templates(chosen: dict[int, OpenImpact], ks: np.ndarray, k0: int, cfg: "TrackerConfig",
                     samplerate: float, pre: int) -> dict[int, Template]:
    """A template per polarity (parity of the step number) from the chosen steps."""
    templates: dict[int, Template] = {}
    by_pol: dict[int, list[np.ndarray]] = {0: [], 1: []}
    for k in ks:
        pol = (int(k) - k0) % 2
        if len(by_pol[pol]) < cfg.template_steps:
            by_pol[pol].append(chosen[int(k)].imp.wsnippet)
    for pol in (0, 1):
        if len(by_pol[pol]) >= 2:
            templates[pol] = learn_template(by_pol[pol], samplerate, pre=pre)
    if not templates:
        templates[0] = learn_template(by_pol[0] or by_pol[1], samplerate, pre=pre)
    for pol in (0, 1):
        if pol not in templates:
            templates[pol] = templates[1 - pol]
    # each template's time reference is the arrival of its impulse, found the same way for both
    # (timing.first_arrival): the polarity offset measures the steps' timing, not their sounds
    return templates


def _fine_times(chosen: dict[int, OpenImpact], ks: np.ndarray, k0: int, templates: dict[int, Template],
                cfg: "TrackerConfig", samplerate: float) -> tuple[list[int], list[float]]:
    """The chosen steps timed against their templates (those that match well), numbered from k0."""
    fine_k, fine_t = [], []
    for k in ks:
        o = chosen[int(k)]
        kk = int(k) - k0
        tm = templates[kk % 2]
        max_lag = int(0.002 * samplerate)
        coarse, _ = coarse_lags([o.imp.wsnippet], tm, samplerate, max_lag=max_lag)
        lags, rhos = match_many(o.imp.wsnippet[None, :], tm, max_lag=max_lag, prefer=coarse, tie=COARSE_TIE)
        lag, rho = float(lags[0]), float(rhos[0])
        if rho >= cfg.good_match:
            fine_k.append(kk)
            fine_t.append((o.imp.snippet_start + templates[kk % 2].onset_index + lag) / samplerate)
    return fine_k, fine_t


def _pick_steps(buf: list[OpenImpact], phase: float, P: float, back: float, tol: float) -> dict[int, OpenImpact]:
    """The step of each slot ``phase + k P`` among the impacts from ``back`` before it to ``tol`` after.

    A step's sound can hold several impacts (a hand's bounce as loud as the step): the step
    is the earliest impact within 6 dB of the slot's loudest.  But where that earliest one is
    a different sound -- a quieter second clock ticking just before -- the loudest impacts
    form the movement's line: when the loudest and the earliest differ by a delay that is not
    the same from slot to slot (a bounce follows its step at a fixed delay), the chain of
    impacts that lines up better is taken, the loudest on a tie.
    """
    near: dict[int, list[OpenImpact]] = {}
    for o in buf:
        k = int(round((o.t_s - phase + 0.5 * (back - tol)) / P))
        r = o.t_s - (phase + k * P)
        if -back <= r <= tol:
            near.setdefault(k, []).append(o)
    early: dict[int, OpenImpact] = {}
    loud: dict[int, OpenImpact] = {}
    for k, group in near.items():
        top = max(o.imp.frame_snr_db for o in group)
        early[k] = min((o for o in group if o.imp.frame_snr_db >= top - 6.0), key=lambda o: o.t_s)
        loud[k] = max(group, key=lambda o: o.imp.frame_snr_db)
    differ = [k for k in early if early[k] is not loud[k]]
    if len(differ) < 3 or len(early) < 4:
        return early
    delays = np.array([loud[k].t_s - early[k].t_s for k in differ])
    if float(np.std(delays)) < 0.002:
        return early  # the same step's later impact, at a fixed delay (2 ms: our own margin)
    spread_early = _line_spread(early)
    spread_loud = _line_spread(loud)
    return loud if spread_loud <= max(2 * spread_early, spread_early + 0.0005) else early

