"""An escapement's window on a stream: what ``analyze``'s second pass does, for ``listen`` and ``log``.

``analyze`` hears a file once with a quartz step's short window and, where that hears an escapement
(:func:`~tickscope.pipeline.wants_escapement_window`), again from the start with the window that holds
each beat's unlocking as well as its drop, so that lift times and the balance amplitude can be
measured.  A stream cannot be heard twice, so :class:`WindowProbe` keeps the audio of its first
seconds: once the quartz-window analyzer has heard enough beats to say what ticks, the kept audio is
heard again with the escapement's window and that analyzer goes on with the stream if it hears an
escapement (as ``analyze`` keeps its second pass).  The events of the probing seconds are handed on
only then, from the analyzer kept, so a log never holds beats of both windows.

It is an :class:`~tickscope.pipeline.Analyzer` to its callers: everything not defined here is the
kept analyzer's.  No I/O.
"""
from __future__ import annotations

import dataclasses

import numpy as np

from .core.detect import ESCAPEMENT_PRE_S, DetectorConfig
from .model import Block, Event, Summary
from .pipeline import Analyzer, wants_escapement_window

#: The window is chosen once this much audio and this many beats have been heard ...
PROBE_MIN_S = 12.0
PROBE_MIN_BEATS = 40
#: ... or at the latest after this much audio (a sound that has no grid by then keeps the quartz window).
#: Our own margin: a seconds pendulum gives its 40 beats in 40 s; 90 s of 48 kHz mono is 17 MB kept.
PROBE_MAX_S = 90.0
#: How often (audio seconds) the quartz-window analyzer is asked what it hears while probing.
PROBE_CHECK_S = 2.0


class WindowProbe:
    """An Analyzer for a stream whose movement is not known (``movement="auto"``): see the module.

    Parameters are the :class:`~tickscope.pipeline.Analyzer`'s.  With ``movement`` other than
    ``auto``, or a detector whose window already holds an escapement's unlocking, nothing is probed.
    """

    def __init__(self, samplerate: float, **options):
        self._samplerate = samplerate
        self._options = options
        self.current = Analyzer(samplerate, **options)
        self.probing = options.get("movement", "auto") == "auto" and not self.current.lifts_heard
        self._kept: list[Block] = []  # the audio fed while probing, to be heard again
        self._held: list[Event] = []  # the events decided while probing, handed on once decided
        self._next_check_s = PROBE_MIN_S
        self.window_note = ""  # what was chosen, and why (for a test or a screen)

    def __getattr__(self, name):  # everything else is the kept analyzer's
        return getattr(self.__dict__["current"], name)

    def feed(self, block: Block) -> list[Event]:
        evs = self.current.feed(block)
        if not self.probing:
            return evs
        # a reader may reuse its buffer: keep a copy of what was fed
        self._kept.append(dataclasses.replace(block, samples=np.array(block.samples, copy=True)))
        self._held.extend(evs)
        d = self.current.duration_s
        if d >= self._next_check_s:
            self._next_check_s = d + PROBE_CHECK_S
            self._maybe_decide(final=d >= PROBE_MAX_S)
        if self.probing:
            return []
        out, self._held = self._held, []
        return out

    def _maybe_decide(self, final: bool, s: Summary | None = None) -> None:
        """Choose the window if enough has been heard (or ``final``): see the module.  ``s``: the
        quartz-window analyzer's summary when it has been taken already."""
        s = s or self.current.summary()
        if not final and (s.steps_detected < PROBE_MIN_BEATS or self.current.duration_s < PROBE_MIN_S):
            return
        self.probing = False
        kept, self._kept = self._kept, []
        if not wants_escapement_window(s, self.current):
            self.window_note = f"a quartz step's window (heard: {s.sound})"
            return
        det = self._options.get("detector") or DetectorConfig()
        other = Analyzer(self._samplerate, **{**self._options,
                                              "detector": dataclasses.replace(det, pre_s=ESCAPEMENT_PRE_S)})
        held: list[Event] = []
        for b in kept:
            held += other.feed(b)
        ended = self.current.finished
        s2 = other.finish() if ended else other.summary()
        if s2.sound == "escapement":
            if ended:  # the quartz window's last events are not handed on: the other's are
                self.current.drain_final_events()
            self.current, self._held = other, held
            self.window_note = "an escapement's window (lift times heard)"
        else:
            self.window_note = f"a quartz step's window (with an escapement's: {s2.sound})"

    def finish(self) -> Summary:
        summary = self.current.finish()
        if self.probing:  # the stream ended while probing: decide on all of it, as analyze would
            self._maybe_decide(final=True, s=summary)
            summary = self.current.finish()  # (the kept analyzer's: finished already, its summary again)
        return summary

    def drain_final_events(self) -> list[Event]:
        """The events still held back (a stream that ended while probing) and those of finish."""
        out, self._held = self._held, []
        return out + self.current.drain_final_events()

    def decided_until_s(self) -> float:
        """While probing nothing has been handed on: a log resumes from the probe's start."""
        if self.probing:
            return self._kept[0].start_sample / self._samplerate if self._kept else 0.0
        return self.current.decided_until_s()
