"""Live audio capture (sounddevice / PortAudio): the same Block stream as a file.

The PortAudio callback does three things only: copy the chosen channel, note the clocks
and the status, and ``put_nowait`` into a bounded queue.  A full queue or an input
overflow becomes a gap (``Block.gap_before``) that the pipeline never mistakes for missed
steps.  Errors in the callback travel through the queue to the main thread.
"""
from __future__ import annotations

import queue
import sys
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from ..errors import DeviceError, ParameterError
from ..model import Block

INSTALL_HINT = {
    "linux": "install PortAudio: sudo apt-get install libportaudio2 (Debian/Ubuntu) or sudo dnf install portaudio (Fedora)",
    "darwin": "install PortAudio: brew install portaudio",
    "win32": "reinstall sounddevice: pip install --force-reinstall sounddevice (its Windows wheel carries PortAudio)",
}


def sounddevice():
    """Import sounddevice, or raise a one-line DeviceError saying what to install."""
    try:
        import sounddevice as sd
    except OSError as e:  # 'PortAudio library not found'
        hint = INSTALL_HINT.get(sys.platform, INSTALL_HINT["linux"])
        raise DeviceError(f"live audio needs the PortAudio library ({e}); {hint}") from e
    except ImportError as e:
        raise DeviceError("live audio needs the sounddevice package: pip install sounddevice") from e
    return sd


@dataclass(frozen=True)
class DeviceInfo:
    index: int
    name: str
    hostapi: str
    default_samplerate_hz: float
    input_channels: int
    is_default: bool


def list_devices() -> list[DeviceInfo]:
    """Input devices PortAudio knows of."""
    sd = sounddevice()
    try:
        devs = sd.query_devices()
        apis = sd.query_hostapis()
        default_in = sd.default.device[0] if sd.default.device else -1
    except sd.PortAudioError as e:
        raise DeviceError(f"cannot list audio devices: {e}") from e
    out = []
    for i, d in enumerate(devs):
        if d["max_input_channels"] > 0:
            out.append(DeviceInfo(i, d["name"], apis[d["hostapi"]]["name"], float(d["default_samplerate"]),
                                  int(d["max_input_channels"]), i == default_in))
    return out


def resolve_device(spec: str | int | None) -> int | None:
    """A device index from an index or (part of) a name; None = the default input."""
    if spec is None or spec == "":
        return None
    devs = list_devices()
    if isinstance(spec, int) or str(spec).isdigit():
        i = int(spec)
        if any(d.index == i for d in devs):
            return i
        raise DeviceError(f"no input device with index {i} (see: tickscope devices)")
    exact = [d for d in devs if d.name == spec]
    if exact:
        return exact[0].index
    part = [d for d in devs if str(spec).lower() in d.name.lower()]
    if len(part) == 1:
        return part[0].index
    if not part:
        raise DeviceError(f"no input device named like {spec!r} (see: tickscope devices)")
    raise DeviceError(f"{spec!r} matches several devices: {', '.join(d.name for d in part)}")


class Capture:
    """An input stream that yields Blocks with their clock readings.

    Parameters
    ----------
    device : int or None
    samplerate : int
        Hz; always asked for explicitly (a device's default may differ).
    channel : int
        Which input channel to keep.
    queue_blocks : int
        Blocks the queue holds before new ones are dropped (and counted as a gap).
    clock : callable
        Monotonic clock (seconds), injectable for tests.
    """

    def __init__(self, device: int | None, samplerate: int, *, channel: int = 0, blocksize: int = 0,
                 latency: float | str = "high", queue_blocks: int = 512, clock=time.monotonic):
        if channel < 0:
            raise ParameterError(f"--channel {channel}: expected >= 0")
        self.device = device
        self.samplerate = int(samplerate)
        self.channel = channel
        self.blocksize = blocksize
        self.latency = latency
        self._q: queue.Queue = queue.Queue(maxsize=queue_blocks)
        self._clock = clock
        self._frames = 0  # frames delivered by PortAudio so far (including dropped ones)
        self._dropped_pending = 0
        self.overflows = 0
        self.dropped_frames = 0
        self._last_adc_end: float | None = None
        self._stream = None
        self._stopped = threading.Event()

    # -- the PortAudio callback (audio thread): copy, note, enqueue; nothing else -----------------
    def _callback(self, indata, frames, time_info, status) -> None:
        host = self._clock()
        wall = time.time()
        try:
            adc = float(getattr(time_info, "inputBufferAdcTime", 0.0) or 0.0)
        except Exception:  # noqa: BLE001 - a time_info without the field
            adc = 0.0
        gap = 0
        if status and getattr(status, "input_overflow", False):
            self.overflows += 1
            # how much was lost: from the ADC clock when the driver gives one
            if adc and self._last_adc_end:
                gap = max(0, int(round((adc - self._last_adc_end) * self.samplerate)))
        if adc:
            self._last_adc_end = adc + frames / self.samplerate
        start = self._frames + gap
        self._frames = start + frames
        try:
            x = indata[:, self.channel].copy()
        except IndexError:
            x = np.zeros(frames, dtype=np.float32)
        item = Block(x, start, host, wall, adc or None, gap + self._dropped_pending)
        try:
            self._q.put_nowait(item)
            self._dropped_pending = 0
        except queue.Full:
            self._dropped_pending += frames + gap
            self.dropped_frames += frames

    def _finished(self) -> None:
        self._stopped.set()

    # -- main thread ------------------------------------------------------------------------------
    def __enter__(self) -> "Capture":
        sd = sounddevice()
        try:
            self._stream = sd.InputStream(device=self.device, samplerate=self.samplerate,
                                          channels=self.channel + 1, dtype="float32", blocksize=self.blocksize,
                                          latency=self.latency, callback=self._callback,
                                          finished_callback=self._finished)
            self._stream.start()
        except (sd.PortAudioError, ValueError) as e:
            raise DeviceError(f"cannot open the input device: {e}") from e
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        if self._stream is not None:
            try:
                self._stream.stop(ignore_errors=True)
                self._stream.close(ignore_errors=True)
            except Exception:  # noqa: BLE001 - closing a vanished device must not hide the summary
                pass
            self._stream = None

    def blocks(self, *, stall_s: float = 3.0) -> Iterator[Block]:
        """Blocks as they arrive; ends if the stream stops (device lost) — raises DeviceError then."""
        last = self._clock()
        while True:
            try:
                item = self._q.get(timeout=0.1)
            except queue.Empty:
                if self._stopped.is_set() or (self._stream is not None and not self._stream.active):
                    raise DeviceError("the input device stopped delivering audio (unplugged or lost)")
                if self._clock() - last > stall_s:
                    raise DeviceError(f"no audio from the input device for {stall_s:.0f} s (unplugged or lost)")
                continue
            last = self._clock()
            yield item


#: ``calibrate`` reads the blocks as PortAudio delivers them (0 = any size): a block then ends where
#: the device's own chunk ends, and its host time carries no wait for the rest of a chunk (blocks
#: of a fixed size do: see core/clockfit.py).
CALIBRATION_BLOCKSIZE = 0


def clock_readings(device: int | None, samplerate: int, seconds: float, *, latency: float | str = "high",
                   progress=None, clock=time.monotonic) -> tuple[list[tuple[float, float, float]], bool]:
    """Capture for ``seconds`` and return each block's (first sample index, frames, host monotonic time).

    No sound is needed: only when the blocks arrive matters (the method of ``calibrate``).
    ``progress(elapsed_s)`` is called after every block.  Ctrl-C ends the capture early and
    returns what was read, with True for "interrupted" (KeyboardInterrupt is not raised).
    """
    rows: list[tuple[float, float, float]] = []
    t0 = clock()
    try:
        with Capture(device, samplerate, latency=latency, blocksize=CALIBRATION_BLOCKSIZE, clock=clock) as cap:
            for b in cap.blocks():
                rows.append((float(b.start_sample), float(len(b.samples)), float(b.host_time_s)))
                el = clock() - t0
                if progress is not None:
                    progress(min(el, seconds))
                if el >= seconds:
                    break
    except KeyboardInterrupt:
        return rows, True
    return rows, False
