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

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from ..model import Bursts
from .beatsides import _beats_apart
from .burstpattern import _burst_pattern
from .detect import Impact
from .stepinterval import _grow_period, _step_phase, find_interval, nominal_interval
from .steppicks import _grid_line, _pick_steps, impact_weights
from .coarsetiming import COARSE_TIE, coarse_lags
from .steptemplate import Template
from .timing import learn_template, match_many

if TYPE_CHECKING:
    from .trackconfig import TrackerConfig


@dataclass
class OpenImpact:
    """An impact the tracker has not decided yet, with its best time so far."""

    imp: Impact
    t_s: float  # best time estimate (coarse until templates exist)
    slot: int | None = None
    match: float = float("nan")  # against the template of its slot's polarity
    match_any: float = float("nan")  # against either polarity's template
    lift_s: float = float("nan")  # an escapement's beat: from its first sound to its drop


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
    chosen, ks, ts, a, b, keep, sides = _beats_apart(buf, w, chosen, ks, ts, a, b, keep, nom)
    k0 = int(ks[0])
    templates = _learn_templates(chosen, ks[keep] if keep.sum() >= 3 else ks, k0, cfg, samplerate, pre)
    fine_k, fine_t = _fine_times(chosen, ks, k0, templates, cfg, samplerate)
    line_a, line_b, sides = _line_on_fine_times(a, b, k0, sides, fine_k, fine_t)
    nominal = nominal_interval(b, cfg.nominal_tolerance)
    bursts = _burst_pattern(buf, [chosen[int(k)] for k in ks], templates, nominal, cfg, samplerate) if nominal else None
    return Grid(measured_s=float(b), nominal_s=nominal, coherence=coh, a=line_a, b=line_b, templates=templates,
                fine_k=fine_k, fine_t_s=fine_t, bursts=bursts, side_offsets_s=sides)


def _line_on_fine_times(a: float, b: float, k0: int, sides: tuple[float, float], fine_k: list[int],
                        fine_t: list[float]) -> tuple[float, float, tuple[float, float]]:
    """The grid's line numbered from slot k0, refitted on the fine times (with each side's offset
    when the sides sound apart), and the sides' offsets by the grid's numbers."""
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
    return line_a, line_b, sides


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
