"""What the step tracker is told: how it acquires, tracks and decides the step grid (see core/grid.py)."""
from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class TrackerConfig:
    acquire_s: float = 12.0  # seconds of impacts used to find the grid
    acquire_max_s: float = 40.0  # look for a grid in at most the last 40 s of impacts
    retry_s: float = 4.0  # while no grid is found, look again every 4 s of audio
    min_coherence: float = 0.3  # impacts must line up at least this well
    nominal_tolerance: float = 0.005  # measured interval within 0.5 % of a quartz interval
    slot_tolerance_s: float = 0.025  # a step lies within 25 ms of its predicted time
    cluster_s: float = 0.12  # impacts up to 120 ms after a step are part of its sound
    burst_cluster_s: float = 0.35  # the same for step intervals of 2 s and more (bursts)
    min_match: float = 0.3  # below this correlation a sound is not this movement's step
    good_match: float = 0.6  # steps below this are flagged and kept out of the rate fit
    template_steps: int = 24  # steps per polarity averaged into a template
    track_steps: int = 32  # steps in the moving line fit that predicts the next slot
    weak_db: float = 9.0  # a step this much quieter than usual is a failed step (a twitch)
    correction_min_s: float = 0.008  # a correction pulse follows a failed step after 8 ...
    correction_max_s: float = 0.085  # ... to 85 ms
    twitch_s: float = 0.005  # a failed step's twitch sounds within 5 ms of its slot
    # the grid is looked for again when, over the last regrid_window_s of slots, at most this
    # share held any sound while other sounds went on (the clock followed stopped, or
    # was not the movement: our own margins; a failing motor that misses 40 % of its steps keeps
    # its grid, since no other grid is found among the sounds off it)
    regrid_window_s: float = 8.0
    regrid_matched_share: float = 0.6
    regrid_coverage: float = 0.7  # a new grid must hold a matched step in this share of its slots
