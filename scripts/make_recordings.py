"""Regenerate the bundled demo recordings in recordings/ (invented scenarios).

    python scripts/make_recordings.py
"""
import os
import sys

from tickscope.core.simulate import Scenario
from tickscope.io.simfile import write_simulation

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(os.path.dirname(HERE), "recordings")

SCENES = {
    "kitchen-wall-clock.flac": (
        "The round kitchen clock above Ilse Marwood's stove, recorded on a phone held 10 cm "
        "below it: the second hand bounces 52 ms after every step, the tiled room rings, the "
        "phone's gain control pumps, the fridge hums at 50 Hz and someone puts down two cups.",
        Scenario(samplerate_hz=44100, duration_s=250.0, movement="wallclock", rate_s_per_day=2.7,
                 snr_db=24.0, noise="pink", hum_hz=50.0, hum_db=-26.0, second_impact_ms=52.0,
                 second_impact_db=-8.0, reverb_rt60_ms=250.0, agc=True, transients_per_min=1.0,
                 variation_db=0.8, jitter_us=3.0, level_dbfs=-14.0, seed=11),
    ),
    "bench-wristwatch.flac": (
        "A steel wristwatch from the Dorrance workshop lying on a bench pad with a clip-on "
        "microphone on its case back: quiet, dry, one step a second, losing a little; step 41 "
        "was not heard.",
        Scenario(samplerate_hz=48000, duration_s=90.0, movement="wristwatch", rate_s_per_day=-0.42,
                 snr_db=30.0, level_dbfs=-20.0, missed_steps=(41,), jitter_us=2.0, seed=23),
    ),
}


def main() -> int:
    os.makedirs(OUT, exist_ok=True)
    for name, (desc, sc) in SCENES.items():
        path = os.path.join(OUT, name)
        write_simulation(path, sc, subtype="PCM_16", description=desc)
        print(f"{path}: {os.path.getsize(path) / 1e6:.2f} MB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
