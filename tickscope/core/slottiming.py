"""Timing impacts against their slots' step templates, once the grid is known (pure).

Each impact's slot comes from its frame-level time; its time is where the slot polarity's
template matches it best, near-tied correlation lobes settled as :func:`time_on_slots` says.
"""
from __future__ import annotations

from typing import Callable

import numpy as np

from .acquire import OpenImpact
from .coarsetiming import COARSE_TIE, coarse_lags, dominant_period, refine_reach
from .steptemplate import Template
from .timing import match_many

#: the correlation margin by which the attack's lobe must beat the predicted one to be taken (the
#: near-tie margin of earlier versions, which resolved near-tied lobes by the prediction alone)
PREDICTION_TIE = 0.03


def time_on_slots(opens: list[OpenImpact], *, a: float, b: float, templates: dict[int, Template],
                  samplerate: float, tracked: bool, pol_offset: Callable[[int], float],
                  lift_s: Callable) -> None:
    """Time impacts against their slots' templates (the slot from the frame-level time).

    The grid's line is ``a + b * k``; ``tracked``: it is well known (the prediction then helps
    settle near-ties); ``pol_offset(k)``: slot k's polarity's offset from the line (s);
    ``lift_s(rows, lags, pol)``: the lift times of matched rows.  Sets each impact's ``t_s``,
    ``match``, ``slot``, ``match_any`` and ``lift_s``.
    """
    if not opens:
        return
    slots = [int(round((o.t_s - a) / b)) for o in opens]
    pols = [k % 2 if k >= 0 else 0 for k in slots]
    lag, rho, lift = _match_by_polarity(opens, slots, pols, a=a, b=b, templates=templates, samplerate=samplerate,
                                        tracked=tracked, pol_offset=pol_offset, lift_s=lift_s)
    for i, o in enumerate(opens):
        k = slots[i]
        tmpl = templates[pols[i]]
        lag_i, rho_i = float(lag[i]), float(rho[i])
        expect = int(round((a + b * k) * samplerate - o.imp.snippet_start - tmpl.onset_index))
        if abs(expect) <= 0.010 * samplerate and (rho_i < 0.95 or abs(lag_i - expect) > 0.0003 * samplerate):
            # The frame-level onset can be several ms early (a faint sound just before the step
            # started the frame) and the search around it then finds only a side lobe: search
            # around the slot's predicted time as well and keep the better match.
            row = o.imp.wsnippet[None, :]
            ml2 = int(0.002 * samplerate)
            pref2, _ = coarse_lags(row, tmpl, samplerate, max_lag=ml2, center=expect)
            lag2, rho2 = match_many(row, tmpl, max_lag=ml2, center=expect, prefer=pref2, tie=COARSE_TIE,
                                    refine=refine_reach(tmpl, samplerate))
            if rho2[0] > rho_i + 0.05:
                lag_i, rho_i = float(lag2[0]), float(rho2[0])
                lift[i] = lift_s(row, lag_i, pols[i])
        o.t_s = (o.imp.snippet_start + tmpl.onset_index + lag_i) / samplerate
        o.match = rho_i
        o.slot = k
        o.match_any = rho_i  # raised against the other polarity only when the sound is not a step (_event)
        o.lift_s = float(lift[i])


def _match_by_polarity(opens: list[OpenImpact], slots: list[int], pols: list[int], *, a: float, b: float,
                       templates: dict[int, Template], samplerate: float, tracked: bool,
                       pol_offset: Callable[[int], float], lift_s: Callable):
    """Lag (samples), correlation and lift time (s) of each impact against its polarity's template."""
    lag = np.zeros(len(opens))
    rho = np.zeros(len(opens))
    lift = np.full(len(opens), np.nan)
    # Near-tied correlation lobes (a ring's carrier: one a cycle) are settled by where the step
    # should be, from two witnesses: the step's own attack (timing.coarse_lags: coarse, but it
    # sees the sound begin), and, once the grid is well known, the slot's predicted time (with
    # this polarity's offset).  Where they point to different lobes, the prediction's wins unless
    # the attack's matches clearly better (by PREDICTION_TIE): noise can lift a neighbouring cycle
    # over the true one (the attack then still points right), a ring sampled two or three times
    # a cycle can fool the attack (the prediction then still points right), and a logic-
    # regulation correction moves a step by ms from its prediction (its own lobe, which the
    # attack finds, then matches clearly best).
    max_lag = int(0.003 * samplerate)
    for pol in set(pols):
        idx = np.array([i for i, q in enumerate(pols) if q == pol])
        rows = np.stack([opens[i].imp.wsnippet for i in idx])
        tmpl = templates[pol]
        coarse, _ = coarse_lags(rows, tmpl, samplerate, max_lag=max_lag)
        reach = refine_reach(tmpl, samplerate)
        lag[idx], rho[idx] = match_many(rows, tmpl, max_lag=max_lag, prefer=coarse, tie=COARSE_TIE, refine=reach)
        if tracked:
            pred = np.array([((a + b * slots[i]) + pol_offset(slots[i])) * samplerate
                             - opens[i].imp.snippet_start - tmpl.onset_index for i in idx])
            lag_p, rho_p = match_many(rows, tmpl, max_lag=max_lag, prefer=pred, tie=COARSE_TIE, refine=reach)
            half = 0.5 * dominant_period(tmpl, samplerate)
            # (and only where the prediction points at its lobe: within a third of a cycle)
            take = ((np.abs(lag_p - lag[idx]) >= half) & (rho_p >= rho[idx] - PREDICTION_TIE)
                    & (np.abs(lag_p - pred) < 2.0 * half / 3.0))
            if reach > 0:
                # a ring sampled under five times a cycle: its attack cannot tell one cycle from the
                # next (the attack's own lobes are as ambiguous), so the prediction alone settles
                # near-ties, within PREDICTION_TIE (as before there was an attack to ask)
                lag_p, rho_p = match_many(rows, tmpl, max_lag=max_lag, prefer=pred, tie=PREDICTION_TIE,
                                          refine=reach)
                take = np.ones(len(idx), dtype=bool)
            lag[idx] = np.where(take, lag_p, lag[idx])
            rho[idx] = np.where(take, rho_p, rho[idx])
        lift[idx] = lift_s(rows, lag[idx], pol)
    return lag, rho, lift
