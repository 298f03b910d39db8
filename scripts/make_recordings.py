"""Regenerate the bundled demo recordings in recordings/ (invented scenarios).

    python scripts/make_recordings.py                  # all of them, into recordings/
    python scripts/make_recordings.py --out DIR [NAME ...]   # some of them, elsewhere
"""
import argparse
import os
import sys

from tickscope.core.escapesim import EscapementScenario
from tickscope.core.simulate import Scenario
from tickscope.simulation import write_escapement_simulation, write_simulation

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


#: Mechanical escapements (tickscope.core.escapesim).
ESCAPEMENT_SCENES = {
    "bench-lever-watch.flac": (
        "A hand-wound lever watch from the Dorrance workshop lying dial up on the bench pad, the "
        "clip-on microphone on its case back, in a quiet room: 28800 beats an hour, gaining 6 s a "
        "day, tick to tock 0.4 ms longer than tock to tick, lift angle 52 degrees, amplitude 275 "
        "degrees on a fresh wind.",
        EscapementScenario(samplerate_hz=48000, duration_s=30.0, movement="lever", beats_per_hour=28800,
                           rate_s_per_day=6.0, beat_asymmetry_ms=0.4, lift_angle_deg=52.0, amplitude_deg=275.0,
                           beat_jitter_us=15.0, variation_db=0.5, variation_freq_pct=0.3, level_dbfs=-18.0,
                           snr_db=34.0, noise="pink", seed=41),
    ),
    "mantel-pendulum.flac": (
        "The walnut mantel clock in Petra Lindqvist-Amadi's sitting room, recorded on a phone lying "
        "on the mantelpiece beside it: a recoil escapement beating 8100 times an hour, out of beat "
        "(tick to tock 26 ms longer than tock to tick, 5.9 % of a beat), a pendulum "
        "swinging 3 degrees either side, the gong rod ringing after every beat, the room's "
        "reverberation, the phone's gain control pumping between the beats, three knocks and a "
        "few words spoken in the room.",
        EscapementScenario(samplerate_hz=32000, duration_s=90.0, movement="pendulum", beats_per_hour=8100,
                           rate_s_per_day=9.0, pendulum_semi_arc_deg=3.0, pendulum_escapement="recoil",
                           beat_asymmetry_ms=26.0, beat_jitter_us=250.0, ring_hz=380.0, ring_decay_ms=140.0,
                           ring_level_db=-12.0, variation_db=0.8, variation_freq_pct=0.5, level_dbfs=-16.0,
                           snr_db=26.0, noise="pink", reverb_rt60_ms=450.0, agc=True, transients_per_min=1.0,
                           seed=57),
    ),
}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="Regenerate the bundled demo recordings (invented scenes).")
    ap.add_argument("names", nargs="*", help="recordings to make (default: all): "
                    + ", ".join([*SCENES, *ESCAPEMENT_SCENES]))
    ap.add_argument("--out", default=OUT, help="folder to write them to (default: recordings/)")
    args = ap.parse_args(argv)
    names = args.names or [*SCENES, *ESCAPEMENT_SCENES]
    unknown = [n for n in names if n not in SCENES and n not in ESCAPEMENT_SCENES]
    if unknown:
        ap.error(f"unknown recording(s): {', '.join(unknown)}")
    os.makedirs(args.out, exist_ok=True)
    for name in names:
        path = os.path.join(args.out, name)
        if name in SCENES:
            desc, sc = SCENES[name]
            write_simulation(path, sc, subtype="PCM_16", description=desc)
        else:
            desc, sc = ESCAPEMENT_SCENES[name]
            write_escapement_simulation(path, sc, subtype="PCM_16", description=desc)
        print(f"{path}: {os.path.getsize(path) / 1e6:.2f} MB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
