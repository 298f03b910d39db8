"""Simulated recordings to files: the core's simulators rendered through the file writer.

:func:`write_simulation` (a quartz :class:`~tickscope.core.simulate.Scenario`) and
:func:`write_escapement_simulation` (an :class:`~tickscope.core.escapesim.EscapementScenario`)
render chunk by chunk into :func:`tickscope.io.simfile.write_rendered`, which writes the audio and
its truth file.
"""
from __future__ import annotations

from collections.abc import Callable

from .core.escapesim import EscapementRenderer, EscapementScenario
from .core.simulate import Renderer, Scenario
from .io.simfile import truth_path_for, write_rendered

__all__ = ["truth_path_for", "write_escapement_simulation", "write_simulation"]


def write_simulation(path: str, sc: Scenario, *, subtype: str | None = None,
                     progress: Callable[[float], None] | None = None, description: str = "",
                     compression_level: float | None = None) -> dict:
    """Render ``sc`` to ``path`` chunk by chunk and write the truth JSON beside it.

    ``compression_level`` (0..1, lossy formats) is handed to libsndfile: higher is smaller.
    """
    return write_rendered(path, Renderer(sc), sc.samplerate_hz, sc.channels, subtype=subtype, progress=progress,
                           description=description, compression_level=compression_level)


def write_escapement_simulation(path: str, sc: EscapementScenario, *, subtype: str | None = None,
                                progress: Callable[[float], None] | None = None, description: str = "",
                                compression_level: float | None = None) -> dict:
    """Render an escapement scenario to ``path`` chunk by chunk and write the truth JSON beside it.

    The same conventions as :func:`write_simulation`: the format from the extension (lossy codecs
    included), NAME.truth.json beside the audio with ``description``, ``audio_file``,
    ``peak_full_scale``, ``lossy`` and ``compression_level`` added to the simulator's truth
    (``kind: "escapement"``, every parameter and every beat).
    """
    return write_rendered(path, EscapementRenderer(sc), sc.samplerate_hz, sc.channels, subtype=subtype,
                           progress=progress, description=description, compression_level=compression_level)
