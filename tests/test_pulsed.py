"""Pulsed and damped-wave carriers: a spark transmitter's key-down is a train of bursts.

Each spark shocks a tuned circuit into ringing at its resonance, f = 1 / (2 pi sqrt(L C))
(the LC resonance, a handbook relation), decaying with time constant tau; the sparks
come at the spark rate, with random phases from burst to burst. okdecode must bridge the
gaps between bursts (one key-down is one mark) and report the spark rate and the
ringing frequency.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from okdecode.receiver import decode_array
from okdecode.synth import key

RATE_HZ = 48000.0
L_H, C_F = 10e-3, 100e-9  # a 10 mH, 100 nF tank
RING_HZ = 1.0 / (2 * math.pi * math.sqrt(L_H * C_F))  # LC resonance: 5.03 kHz
SPARK_HZ = 600.0
TAU_S = 0.4e-3  # ringing decays to 1/e in 0.4 ms, well inside the 1.7 ms between sparks


def spark_recording(message: str, *, wpm: float, seed: int, snr_db: float = 20.0):
    """Keyed damped-wave bursts in white noise, and the keying they follow."""
    keying = key(message, wpm=wpm, start_s=0.5, seed=seed)
    n = int((keying.end_s[-1] + 0.5) * RATE_HZ)
    rng = np.random.default_rng(seed)
    t_burst = np.arange(int(8 * TAU_S * RATE_HZ)) / RATE_HZ
    burst = np.exp(-t_burst / TAU_S) * np.sin(2 * np.pi * RING_HZ * t_burst)
    x = np.zeros(n)
    for start, end in zip(keying.start_s, keying.end_s, strict=True):
        # sparks at the spark rate with 2 % timing spread: each rings from its own start
        times = np.arange(start, end, 1.0 / SPARK_HZ)
        times = times + rng.normal(0.0, 0.02 / SPARK_HZ, times.size)
        for t0 in times:
            i = int(t0 * RATE_HZ)
            j = min(n, i + burst.size)
            x[i:j] += burst[: j - i]
    power = float(np.mean(x[x != 0] ** 2))
    x += rng.normal(0.0, math.sqrt(power) * 10 ** (-snr_db / 20), n)
    return 0.5 * x / np.max(np.abs(x)), keying


@pytest.mark.parametrize("seed", [1, 2])
def test_a_spark_train_decodes_with_its_spark_rate_and_ringing_frequency(seed):
    samples, keying = spark_recording("XQ7ZB TEST", wpm=15.0, seed=seed)
    got = decode_array(samples, RATE_HZ)
    assert got.text == keying.text
    d = got.to_dict()
    # the spark rate is a line of the power's fluctuation spectrum, resolved to ~2 Hz
    assert d["spark_rate_hz"] == pytest.approx(SPARK_HZ, rel=0.01)
    # the ringing frequency is the power-weighted centre of the keyed span; the burst's
    # spectrum is a Lorentzian around the resonance, 1 / (pi tau) = 800 Hz wide, sampled
    # in 77 Hz search bins, so it is held to a few per cent of the resonance
    assert d["ringing_hz"] == pytest.approx(RING_HZ, rel=0.03)
    assert any("pulsed" in n for n in got.notes)
    # one key-down is one mark: the marks match the keying one for one
    assert got.marks.n_marks == keying.n_marks
    # PARIS (common practice): 15 WPM is a 80 ms dot
    assert got.wpm == pytest.approx(15.0, rel=0.01)


def test_a_steady_carrier_is_not_taken_for_a_pulsed_one():
    from okdecode.synth import synth

    rec = synth("XQ7ZB TEST", wpm=20.0, carrier_hz=1200.0, rate_hz=RATE_HZ, cn0_dbhz=60.0,
                seed=3)
    got = decode_array(rec.samples, RATE_HZ)
    assert got.text == rec.truth.text
    assert got.to_dict()["spark_rate_hz"] is None
    assert not any("pulsed" in n for n in got.notes)
