"""An escapement far out of beat found while acquiring the grid: where its other beat sounds in a
slot, or where each side's beats lie about the line (pure; used by core/acquire.py)."""
from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from .escapement import ESCAPE_BEAT_RANGE_S
from .steppicks import _pick_steps, impact_weights

if TYPE_CHECKING:
    from .acquire import OpenImpact


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
    # a motor whose every step sounds twice (a hand's bounce 45 ms after the step) has both places
    # on both sides, and either may win a side: the sides are at places of their own only when each
    # side's place is empty in half the other side's slots
    for p in (0, 1):
        sel = near & (k % 2 == 1 - p)
        if len(np.unique(k[sel & (np.abs(r - out[p]) <= 1.5 * bw)])) >= 0.5 * len(np.unique(k[sel])):
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


def _beats_apart(buf: list[OpenImpact], w: np.ndarray, chosen: dict, ks: np.ndarray, ts: np.ndarray, a: float,
                 b: float, keep: np.ndarray, nom: float | None):
    """The steps chosen on the line ``a + b k`` (slot numbers ``ks``, times ``ts``, ``keep`` those on
    the line), taken as an escapement's two beats where it sounds far out of beat: (chosen, ks, ts,
    a, b, keep, side offsets), as given with offsets (0, 0) otherwise."""
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
            chosen, ks, ts, a, b, keep, sides = _on_side_places(buf, w, chosen, ks, ts, a, b, keep)
    elif ESCAPE_BEAT_RANGE_S[0] <= b <= ESCAPE_BEAT_RANGE_S[1]:
        # a quartz interval an escapement beats at too: a seconds pendulum out of beat by more than a
        # motor's polarities ever are (SIDES_APART_S) sounds each side at a place of its own (a
        # slower grid is a motor's: its end-of-life bursts are not two sides)
        chosen, ks, ts, a, b, keep, sides = _on_side_places(buf, w, chosen, ks, ts, a, b, keep)
    return chosen, ks, ts, a, b, keep, sides


def _on_side_places(buf, w, chosen, ks, ts, a, b, keep):
    """The grid's beats picked again at each side's own place (see :func:`_side_places`), or as given."""
    d = _side_places(buf, w, a, b)
    if d is None:
        return chosen, ks, ts, a, b, keep, (0.0, 0.0)
    tol = min(0.1 * b, 0.03)
    picks = [_pick_steps(buf, a + d[p] + p * b, 2 * b, tol, tol) for p in (0, 1)]
    return _two_sides(picks)
