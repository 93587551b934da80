"""Robustness: how many seeded recordings of each impairment both decoders read exactly.

    python bench/robustness.py              # every scenario (a few minutes on 2 cores)
    python bench/robustness.py --only agc   # one scenario

Each scenario is made with okdecode's generator, some with a receiver's filter from
scipy.signal or a tone added with numpy; okdecode knows neither the carrier nor the
speed. A row counts the recordings whose text is exactly the one keyed (as
okdecode.text.canonical spells it), for the threshold and the sequence decoder. The
scenarios and their seeds are those quoted in the closing notes of issue 7; the tests in
tests/test_impairments.py hold one or a few seeds of each.
"""

from __future__ import annotations

import argparse
import os
import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np

from okdecode.capture import from_array
from okdecode.receiver import decode_all_carriers, decode_array
from okdecode.synth import Station, synth
from okdecode.text import canonical

MESSAGE = "QZ4RB DE QY2LM RST 559 73"
DECODERS = ("threshold", "sequence")


def _exact(samples: np.ndarray, rate_hz: float, truth: str) -> tuple[bool, bool]:
    return tuple(canonical(decode_array(samples, rate_hz, decoder=d).text) == canonical(truth)
                 for d in DECODERS)


def speed_change(first: float, then: float, seed: int):
    a = synth("QZ4RB QZ4RB", wpm=first, carrier_hz=700.0, rate_hz=8000.0, cn0_dbhz=34.0,
              seed=100 + seed, tail_s=0.5)
    b = synth("QY2LM 73", wpm=then, carrier_hz=700.0, rate_hz=8000.0, cn0_dbhz=34.0,
              seed=200 + seed, lead_s=0.01)
    x = np.concatenate([a.samples, b.samples])
    return _exact(x, 8000.0, f"{a.truth.text} {b.truth.text}")


def agc(cn0_dbhz: float, lift_db: float, seed: int):
    rec = synth(MESSAGE, carrier_hz=700.0, rate_hz=8000.0, seed=100 + seed, cn0_dbhz=cn0_dbhz,
                agc_db=lift_db, wpm=20.0)
    return _exact(rec.samples, rec.rate_hz, rec.truth.text)


def narrow_filter(cn0_dbhz: float, seed: int):
    from scipy import signal

    rec = synth(MESSAGE, wpm=20.0, carrier_hz=700.0, rate_hz=8000.0, cn0_dbhz=cn0_dbhz,
                seed=40 + seed)
    sos = signal.butter(4, [575.0, 825.0], btype="bandpass", fs=8000.0, output="sos")
    return _exact(signal.sosfilt(sos, rec.samples), 8000.0, rec.truth.text)


def drift(drift_hz: float, seed: int):
    rec = synth(MESSAGE, carrier_hz=700.0, rate_hz=8000.0, seed=50 + seed, cn0_dbhz=34.0,
                drift_hz=drift_hz, wpm=20.0)
    return _exact(rec.samples, rec.rate_hz, rec.truth.text)


def tuning_carrier(held_s: float, seed: int):
    rec = synth(MESSAGE, wpm=20.0, carrier_hz=700.0, rate_hz=8000.0, cn0_dbhz=34.0,
                seed=60 + seed, lead_s=held_s + 0.7)
    t = np.arange(rec.samples.size) / rec.rate_hz
    on = (t >= 0.2) & (t < 0.2 + held_s)
    x = rec.samples + np.where(on, rec.truth.amplitude * np.cos(2 * np.pi * 700.0 * t), 0.0)
    return _exact(x, rec.rate_hz, rec.truth.text)


def fading_carrier(period_s: float, depth_db: float, seed: int):
    rec = synth(MESSAGE, wpm=20.0, carrier_hz=700.0, rate_hz=8000.0, cn0_dbhz=30.0,
                seed=70 + seed)
    t = np.arange(rec.samples.size) / rec.rate_hz
    fade_db = -0.5 * depth_db * (1.0 + np.sin(2 * np.pi * t / period_s))
    steady = rec.truth.amplitude * np.sqrt(10.0) * 10 ** (fade_db / 20.0)
    x = rec.samples + steady * np.cos(2 * np.pi * 1500.0 * t)
    return _exact(x, rec.rate_hz, rec.truth.text)


def two_at_once(level_db: float, seed: int):
    # --all-carriers: both stations read exactly (the same either way for both columns)
    rec = synth(MESSAGE, wpm=20.0, carrier_hz=700.0, rate_hz=8000.0, cn0_dbhz=34.0,
                seed=31 + seed, stations=(Station(carrier_hz=820.0, level_db=level_db,
                                                  wpm=25.0, message="VVV DE QX9TT QX9TT",
                                                  start_s=1.0),))
    want = sorted([rec.truth.text, rec.truth.others[0].text])
    out = []
    for d in DECODERS:
        got = decode_all_carriers(from_array(rec.samples, 8000.0), decoder=d)
        out.append(sorted(r.text for r in got) == want)
    return tuple(out)


def slow_code(cn0_dbhz: float, seed: int):
    rec = synth("QZ4RB DE QY2LM", wpm=5.0, carrier_hz=700.0, rate_hz=8000.0,
                cn0_dbhz=cn0_dbhz, seed=60 + seed)
    return _exact(rec.samples, rec.rate_hz, rec.truth.text)


def nothing_there(kind: int, seed: int):
    # noise alone, a steady tone, hum: True where a decoder gives no text at all
    options = [{}, {"stations": (Station(carrier_hz=900.0, level_db=0.0),)},
               {"hum_hz": 50.0, "hum_db": 0.0}][kind]
    rec = synth("", duration_s=20.0, cn0_dbhz=30.0, seed=9000 + 3 * seed + kind, **options)
    return tuple(not decode_array(rec.samples, rec.rate_hz, decoder=d).text for d in DECODERS)


SCENARIOS = {
    "speed": ("abrupt speed change, WPM then WPM, 34 dB-Hz", speed_change,
              [(a, b) for a, b in [(14, 26), (26, 14), (12, 25), (30, 15), (18, 36)]], 3),
    "agc": ("receiver AGC, C/N0 dB-Hz and lift dB", agc,
            [(c, g) for c in (38.0, 41.0, 44.0) for g in (15.0, 20.0)], 24),
    "filter": ("250 Hz Butterworth CW filter, C/N0 dB-Hz", narrow_filter,
               [(26.0,), (30.0,), (34.0,)], 12),
    "drift": ("linear drift over the message, Hz", drift, [(150.0,), (-200.0,), (300.0,)], 6),
    "held": ("key held down before the message, s", tuning_carrier, [(1.0,), (3.0,)], 6),
    "fading": ("steady carrier 10 dB up, fading: period s, depth dB", fading_carrier,
               [(p, d) for p in (1.0, 3.0, 8.0) for d in (10.0, 20.0)], 4),
    "two": ("a second station 120 Hz up at once, dB (--all-carriers)", two_at_once,
            [(0.0,), (3.0,), (6.0,)], 3),
    "slow": ("5 WPM, C/N0 dB-Hz", slow_code, [(19.0,), (20.0,), (21.0,)], 6),
    "none": ("noise / steady tone / hum alone: no text", nothing_there,
             [(0,), (1,), (2,)], 30),
}


def _job(job):
    name, params, seed = job
    return name, params, SCENARIOS[name][1](*params, seed)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", choices=list(SCENARIOS), action="append", default=None)
    ap.add_argument("--workers", type=int, default=min(2, os.cpu_count() or 1))
    args = ap.parse_args()
    names = args.only or list(SCENARIOS)
    jobs = [(n, p, s) for n in names for p in SCENARIOS[n][2] for s in range(SCENARIOS[n][3])]
    t0 = time.perf_counter()
    counts: dict = {}
    with ProcessPoolExecutor(max_workers=args.workers) as pool:
        for name, params, ok in pool.map(_job, jobs, chunksize=2):
            c = counts.setdefault((name, params), [0, 0, 0])
            c[0] += 1
            c[1] += int(ok[0])
            c[2] += int(ok[1])
    print(f"{'scenario':58s} {'n':>3s} {'threshold':>9s} {'sequence':>9s}")
    for name in names:
        title = SCENARIOS[name][0]
        for params in SCENARIOS[name][2]:
            n, a, b = counts[(name, params)]
            label = f"{title}: {', '.join(f'{p:g}' for p in params)}"
            print(f"{label:58s} {n:3d} {a:9d} {b:9d}")
    print(f"\n{len(jobs)} recordings in {time.perf_counter() - t0:.0f} s")


if __name__ == "__main__":
    main()
