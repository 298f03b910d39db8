"""A polarity's step template and what is cached on it for matching (see core/timing.py)."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError


@dataclass(frozen=True)
class Template:
    """The average sound of one polarity, aligned, in snippet coordinates.  Its time reference,
    ``onset_index``, is the arrival of its first impact (:func:`first_arrival`)."""

    wave: np.ndarray  # float64, same length and origin as the snippets it came from
    onset_index: float  # sub-sample index of the first impact's onset in `wave`
    window: np.ndarray  # taper applied to `wave` for matching (zero outside the window)
    n_used: int  # snippets averaged
    energy: float  # sum of squares of the windowed template
    #: the arrival found at other levels of the first peak (ARRIVAL_CHECK_LEVELS): how much the
    #: time reference depends on the level chosen (same indices as onset_index)
    arrival_checks: tuple[float, ...] = ()

    @property
    def matched(self) -> np.ndarray:
        return self.wave * self.window


def _window_span(template: Template) -> tuple[int, int]:
    """First and one-past-last index of the template's matching window (cached on the template)."""
    span = template.__dict__.get("_span")
    if span is None:
        nz = np.flatnonzero(template.window)
        if not len(nz):
            raise ParameterError("template window is empty")
        span = template.__dict__["_span"] = (int(nz[0]), int(nz[-1]) + 1)
    return span


def _template_spectrum(template: Template, s0: int, s1: int, nfft: int) -> np.ndarray:
    """conj(rfft) of the template's windowed part, cached on the template (it never changes)."""
    cache = template.__dict__.setdefault("_spectra", {})
    key = (s0, s1, nfft)
    spec = cache.get(key)
    if spec is None:
        spec = cache[key] = np.conj(np.fft.rfft(template.matched[s0:s1], nfft)).astype(np.complex64)
    return spec
