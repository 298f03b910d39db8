"""Coarse timing of a step on the right carrier cycle, from its template's attack alone (pure; see
core/timing.py)."""
from __future__ import annotations

import numpy as np

from . import dsp
from .steptemplate import Template, _window_span


#: Carrier lobes within this share of the best are told apart by the onset (coarse) timing: the
#: nearest to it wins (our own margin, to be checked on recordings not made by our simulator).
COARSE_TIE = 0.15
#: The attack: the part of a template a step's coarse time is matched on, from its arrival (s; our
#: own choice: a few cycles of a ring, where a one-cycle shift moves the attack off its place)
ATTACK_S = 0.0015


def dominant_period(template: Template, samplerate: float) -> float:
    """The period (samples) of the strongest frequency of the template's matched part (cached)."""
    got = template.__dict__.get("_period")
    if got is None:
        x = template.matched
        n = dsp.fast_len(4 * len(x))
        P = np.abs(np.fft.rfft(x, n))
        P[0] = 0.0
        f = (int(np.argmax(P)) or 1) * samplerate / n
        got = template.__dict__["_period"] = samplerate / f
    return got


def attack_template(template: Template, samplerate: float) -> Template:
    """The template cut to its attack: from a carrier period before its matching window (where a
    sound one cycle early would show) to ``ATTACK_S`` or two periods after the sound's start,
    whichever is longer.  Its
    correlation lobes one carrier cycle apart differ clearly, where those of a long steady ring are
    nearly equal; cached on the template."""
    got = template.__dict__.get("_attack")
    if got is None:
        L = len(template.wave)
        per = dominant_period(template, samplerate)
        # from where its matching window begins (half a ms before the sound's start, as onset_of
        # finds it), not from its arrival: the attack must hold the sound's first cycles whatever
        # peak the arrival was taken at
        s0, _ = _window_span(template)
        a = max(0, int(np.floor(s0 - per)))
        b = min(L, int(np.ceil(s0 + 0.0005 * samplerate + max(ATTACK_S * samplerate, 2 * per))))
        w = np.zeros(L)
        if b > a:
            w[a:b] = dsp.tukey(b - a, 0.2)
        got = template.__dict__["_attack"] = Template(template.wave, template.onset_index, w, template.n_used,
                                                      float(np.sum((template.wave * w) ** 2)))
    return got


def refine_reach(template: Template, samplerate: float) -> float:
    """How far below the top a correlation lobe may read and still be refined: every lobe (0.7) when
    the template's ring is sampled under five times a cycle, whose true peaks can fall between
    samples and read low until refined; none beyond the choice's own margin otherwise."""
    return 0.7 if dominant_period(template, samplerate) < 5.0 else 0.0


def coarse_lags(snippets, template: Template, samplerate: float, *, max_lag: int,
                center: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Each snippet's lag against ``template`` from its attack alone (:func:`attack_template`): coarse,
    but meant to be on the right carrier cycle (domain notes 5.1: the carrier phase only after
    coarse timing is unambiguous), in the units of :func:`match_many`; and how clearly that cycle
    wins: one minus the normalised attack correlation one carrier period either side over its own
    (0: the neighbouring cycles match as well, 1: they do not match at all)."""
    rows = np.atleast_2d(np.asarray(snippets if not isinstance(snippets, list) else np.stack(snippets),
                                    dtype=np.float64))
    at = attack_template(template, samplerate)
    a0, a1 = _window_span(at)
    seg = at.matched[a0:a1]
    per = dominant_period(template, samplerate)
    lo = max(0, a0 + center - max_lag)
    hi = min(rows.shape[1], a1 + center + max_lag)
    nt = len(seg)
    if hi - lo < nt + 2:  # the lags asked for lie (mostly) outside the snippets
        return np.full(len(rows), np.nan), np.zeros(len(rows))
    x = rows[:, lo:hi]
    nfft = 1 << int(np.ceil(np.log2(max(hi - lo, 1) + nt)))
    c = np.fft.irfft(np.fft.rfft(x, nfft, axis=1) * np.conj(np.fft.rfft(seg, nfft)), nfft, axis=1)
    nlag = x.shape[1] - nt + 1
    if nlag < 3:
        return np.full(len(rows), np.nan), np.zeros(len(rows))
    cs = np.concatenate([np.zeros((len(x), 1)), np.cumsum(x * x, axis=1)], axis=1)
    e = cs[:, nt: nt + nlag] - cs[:, :nlag]
    r = c[:, :nlag] / np.sqrt(np.maximum(e * float(seg @ seg), 1e-300))
    j = np.argmax(r, axis=1)
    ar = np.arange(len(r))
    y0, y1, y2 = r[ar, np.clip(j - 1, 0, nlag - 1)], r[ar, j], r[ar, np.clip(j + 1, 0, nlag - 1)]
    den = y0 - 2 * y1 + y2
    frac = np.where(den < 0, 0.5 * (y0 - y2) / np.where(den < 0, den, -1.0), 0.0)
    lag = lo + j + np.clip(frac, -0.5, 0.5) - a0
    p = max(1, int(round(per)))
    side = np.maximum(r[ar, np.clip(j - p, 0, nlag - 1)], r[ar, np.clip(j + p, 0, nlag - 1)])
    clear = np.where(y1 > 0, 1.0 - np.maximum(side, 0.0) / np.where(y1 > 0, y1, 1.0), 0.0)
    return lag, clear
