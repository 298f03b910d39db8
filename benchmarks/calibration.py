"""How often the device-clock calibration's 95 % interval covers the truth (prints figures).

    python benchmarks/calibration.py                    # synthetic readings and the loopback
    python benchmarks/calibration.py --only synthetic   # no sound server needed
    python benchmarks/calibration.py --quick            # fewer runs, shorter captures

Synthetic: block readings built the way a capture makes them (core.clockfit.simulate_readings),
of a device of known ppm, in the cases the fit must handle.  Loopback: real captures through the
PulseAudio null sink, whose pacing against the host clock follows from its own arithmetic (a
chunk of whole frames advances its clock by the chunk's length truncated to whole microseconds);
captures during which another stream used the sink are left out and counted.  Nothing here is a
pass/fail test.
"""
from __future__ import annotations

import argparse
import math
import os
import subprocess
import sys
import threading
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))

from tickscope.core.clockfit import fit_device_clock
from tickscope.core.clocksim import simulate_readings

FS = 48000
CASES = {
    "USB, as delivered": dict(chunk_frames=48, delay_ms=1.0),
    "USB, 2048-frame blocks, capture times": dict(chunk_frames=48, block_frames=2048, delay_ms=1.0, adc=True),
    "sink 416, as delivered, stalls": dict(chunk_frames=416, delay_ms=0.5, stall_rate_hz=0.2),
    "sink 2047 / 2048 blocks": dict(chunk_frames=2047, block_frames=2048, delay_ms=0.5),
    "sink 2047 / 2048 blocks, capture times": dict(chunk_frames=2047, block_frames=2048, delay_ms=0.5, adc=True),
    "stalls 2/s of 20-120 ms": dict(chunk_frames=480, delay_ms=1.0, stall_rate_hz=2.0),
    "load episodes (x20, x50)": dict(chunk_frames=480, delay_ms=1.0, load=((10, 18, 20.0), (30, 33, 50.0))),
    "heavy-tailed delays": dict(chunk_frames=480, delay_ms=3.0, delay_shape=0.3),
    "host clock step 0.35 s": dict(chunk_frames=480, delay_ms=2.0, host_steps=((120.0, 0.35),)),
    "delivery shift 9 ms": dict(chunk_frames=416, delay_ms=0.5, shifts=((17.0, 0.009),)),
    "lost audio, length 5 ms off": dict(chunk_frames=480, delay_ms=1.0, gaps=((15.0, 0.5, 0.005),)),
    "floor wander 40 us / 5 s": dict(chunk_frames=480, delay_ms=1.0, wander=(40e-6, 5.0)),
    "floor wander 80 us / 20 s": dict(chunk_frames=480, delay_ms=1.0, wander=(80e-6, 20.0)),
}


def hdr(text):
    print(f"\n== {text}", flush=True)


def synthetic(runs: int, lengths: list[float]) -> None:
    hdr(f"synthetic readings: 95 % interval covers the set ppm (uniform in +-100), {runs} runs per case")
    print(f"{'case':42s} " + "  ".join(f"{L:>5.0f} s: covered, median ±ppm" for L in lengths))
    rng = np.random.default_rng(2024)
    for name, kw in CASES.items():
        kw = dict(kw)
        adc = kw.pop("adc", False)
        bf = kw.get("block_frames", 0)
        cells = []
        for L in lengths:
            hits, ci = 0, []
            for _ in range(runs):
                ppm = rng.uniform(-100, 100)
                d = simulate_readings(rng, ppm=ppm, seconds=L, **kw)
                f = fit_device_clock(d["start"], d["host"], FS, frames=d["frames"], block_frames=bf,
                                     adc_time_s=d["adc"] if adc else None)
                hits += abs(f.ppm - ppm) <= f.ci95_ppm
                ci.append(f.ci95_ppm)
            cells.append(f"{hits:3d}/{runs} ±{np.median(ci):8.2f}")
        print(f"{name:42s} " + "  ".join(f"{c:>29s}" for c in cells), flush=True)


# -- the loopback -------------------------------------------------------------------------------------
def _sink_state():
    sinks = subprocess.run(["pactl", "list", "sinks"], capture_output=True, text=True, timeout=10).stdout
    conf = None
    for line in sinks.splitlines():
        if "configured" in line:
            conf = int(line.split("configured")[1].split()[0])
    ins = subprocess.run(["pactl", "list", "short", "sink-inputs"], capture_output=True, text=True, timeout=10).stdout
    outs = subprocess.run(["pactl", "list", "short", "source-outputs"], capture_output=True, text=True,
                          timeout=10).stdout
    return conf, len(ins.splitlines()), len(outs.splitlines())


def sink_pacing_ppm(configured_us: int, rate: int = FS) -> float:
    """PulseAudio 16, src/modules/module-null-sink.c: max_request = pa_usec_to_bytes(latency) (whole
    frames), and each rendered chunk advances the sink's clock by pa_bytes_to_usec(chunk), which
    truncates to whole microseconds."""
    frames = configured_us * rate // 1_000_000
    exact = frames * 1e6 / rate
    return (exact / math.floor(exact) - 1.0) * 1e6


def _capture(seconds: float, blocksize: int, latency="high"):
    """Per-block (start, frames, host, adc) through the pulse device, and the sink's state meanwhile."""
    import sounddevice as sd

    rows, seen, stop = [], [], threading.Event()

    def watch():
        while not stop.is_set():
            seen.append(_sink_state())
            stop.wait(1.0)

    def cb(indata, frames, ti, status):
        rows.append((time.monotonic(), frames, ti.inputBufferAdcTime))

    w = threading.Thread(target=watch, daemon=True)
    w.start()
    with sd.InputStream(device="pulse", samplerate=FS, channels=1, dtype="float32", latency=latency,
                        blocksize=blocksize, callback=cb):
        t0 = time.monotonic()
        while time.monotonic() - t0 < seconds:
            time.sleep(0.2)
    stop.set()
    w.join()
    a = np.array(rows)
    start = np.r_[0, np.cumsum(a[:, 1])[:-1]]
    mid = seen[2:-2]
    confs = {c for c, _, _ in mid}
    alone = len(confs) == 1 and all(i == 0 and o == 1 for _, i, o in mid)
    return start, a[:, 1], a[:, 0], a[:, 2], (confs.pop() if alone else None)


def loopback(runs: int, run_s: float, long_s: float) -> None:
    loop_dir = os.environ.get("TICKSCOPE_LOOPBACK_DIR", "/tmp/tickscope-loopback")
    if "PULSE_SERVER" not in os.environ and os.path.exists(f"{loop_dir}/native"):
        os.environ["PULSE_SERVER"] = f"unix:{loop_dir}/native"
        os.environ.setdefault("PULSE_COOKIE", f"{loop_dir}/cookie")
    try:
        import sounddevice as sd

        sd._terminate()
        sd._initialize()
        if "pulse" not in [d["name"] for d in sd.query_devices()]:
            raise OSError("no 'pulse' device")
    except (OSError, ImportError) as e:
        hdr(f"loopback: skipped ({e}; bash scripts/audio-loopback.sh start)")
        return
    hdr(f"loopback, as calibrate reads it (latency high, blocks as delivered): {runs} captures of {run_s:.0f} s")
    hits = kept = disturbed = 0
    errs = []
    for _ in range(runs):
        start, fr, host, adc, conf = _capture(run_s, 0)
        if conf is None:
            disturbed += 1
            continue
        truth = sink_pacing_ppm(conf)
        f = fit_device_clock(start, host, FS, frames=fr, block_frames=0)
        hits += abs(f.ppm - truth) <= f.ci95_ppm
        kept += f.ci95_ppm <= 5.0
        errs.append((f.ppm - truth, f.ci95_ppm))
    n = runs - disturbed
    print(f"covered {hits}/{n} (truth {sink_pacing_ppm(8687):+.2f} ppm at the default latency); "
          f"{kept}/{n} within ± 5 ppm and kept; {disturbed} left out (another stream used the sink)")
    print("  error / half-width (ppm): " + " ".join(f"{e:+.2f}/{u:.2f}" for e, u in errs))
    for blocksize, label in ((0, "as delivered"), (2048, "2048-frame blocks, as listen and log read")):
        hdr(f"loopback, one {long_s:.0f} s capture ({label}), cut into windows")
        start, fr, host, adc, conf = _capture(long_s, blocksize)
        if conf is None:
            print("left out: another stream used the sink during the capture")
            continue
        truth = sink_pacing_ppm(conf)
        x = start / FS
        f = fit_device_clock(start, host, FS, frames=fr, block_frames=None if blocksize else 0, adc_time_s=adc)
        print(f"whole capture: {f.ppm:+.3f} ± {f.ci95_ppm:.3f} ppm (truth {truth:+.3f}, configured {conf} us)")
        for L in (20.0, 40.0, 120.0):
            h = n = 0
            for t0 in np.arange(0.0, x[-1] - L, L / 2):
                s = (x >= t0) & (x < t0 + L)
                g = fit_device_clock(start[s], host[s], FS, frames=fr[s], block_frames=None if blocksize else 0,
                                     adc_time_s=adc[s])
                n += 1
                h += abs(g.ppm - truth) <= g.ci95_ppm
            print(f"  windows of {L:.0f} s (half overlapping): covered {h}/{n}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--only", choices=("synthetic", "loopback"))
    a = ap.parse_args()
    if a.only in (None, "synthetic"):
        synthetic(20 if a.quick else 100, [40.0] if a.quick else [40.0, 120.0])
    if a.only in (None, "loopback"):
        loopback(3 if a.quick else 10, 40.0, 120.0 if a.quick else 600.0)


if __name__ == "__main__":
    main()
