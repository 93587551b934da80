"""Tests of stage 2 (okdecode.marks): noise floor, adaptive threshold, marks and spaces."""

from __future__ import annotations

import math

import numpy as np
import pytest

from okdecode import baseband as bb
from okdecode import marks as mk
from okdecode.synth import key

RATE_HZ = 1000.0  # a baseband rate like the chain's (750 to 1500 Hz)
MESSAGE = "XQ7ZB DE XQ3AB TEST 73"


def keyed_baseband(rng, keying, *, es_n0_db: float, amplitude: float = 0.1,
                   fade_db: float = 0.0, fade_period_s: float = 6.0, lead_s: float = 0.5):
    """Complex baseband: amplitude A while keyed, white complex noise set by E/N0 of a dot.

    C/N0 = A**2 / N0 with N0 = E|n|**2 / rate (complex baseband convention of okdecode),
    and E = C * dot_s is a dot's energy.
    """
    dot_s = keying.dot_s
    duration_s = keying.end_s[-1] + 2 * lead_s
    t = np.arange(int(duration_s * RATE_HZ)) / RATE_HZ
    on = np.zeros(t.size, dtype=bool)
    for a, b in zip(keying.start_s + lead_s, keying.end_s + lead_s, strict=True):
        on |= (t >= a) & (t < b)
    gain = 10 ** (-fade_db / 20 * 0.5 * (1 - np.cos(2 * np.pi * t / fade_period_s)))
    cn0 = 10 ** (es_n0_db / 10) / dot_s
    n0 = amplitude**2 / cn0
    sigma = math.sqrt(n0 * RATE_HZ / 2)  # per component
    noise = sigma * (rng.standard_normal(t.size) + 1j * rng.standard_normal(t.size))
    z = (amplitude * gain * on + noise).astype(np.complex64)
    base = bb.Baseband(samples=z, rate_hz=RATE_HZ, start_s=0.0, carrier_hz=700.0, channel=0,
                       duration_s=t.size / RATE_HZ, half_band_hz=250.0)
    return base, keying.start_s + lead_s, keying.end_s + lead_s


def edge_tolerance_s(dot_s: float, es_n0_db: float) -> float:
    """Allowed edge error of a matched (dot-long) moving average and a mid-level threshold.

    On the ramp of slope A / T the noise along the signal (sigma**2 = N0 / (2 T)) moves the
    crossing by sigma_t = T / sqrt(2 E / N0); the noise mean sqrt(pi / 2) sigma raises the
    threshold, which moves each edge by up to T sqrt(pi / 2) / (2 sqrt(2 E / N0)) (Rayleigh
    mean, Proakis, Digital Communications, 2.3). Allow 5 sigma_t, that bias and a sample.
    """
    root = math.sqrt(2 * 10 ** (es_n0_db / 10))
    return 5 * dot_s / root + dot_s * math.sqrt(math.pi / 2) / (2 * root) + 1 / RATE_HZ


@pytest.mark.parametrize(("wpm", "es_n0_db"), [(12.0, 20.0), (25.0, 20.0), (40.0, 25.0)])
def test_marks_match_the_keying(rng, wpm, es_n0_db):
    k = key(MESSAGE, wpm=wpm)
    base, start, end = keyed_baseband(rng, k, es_n0_db=es_n0_db)
    env = bb.envelope(base, filter_s=k.dot_s, source="<test>")
    found = mk.find(env, window_s=max(1.0, 25 * k.dot_s), min_mark_s=0.4 * k.dot_s,
                    min_space_s=0.4 * k.dot_s)
    assert found.n_marks == k.n_marks
    tol = edge_tolerance_s(k.dot_s, es_n0_db)
    assert np.max(np.abs(found.start_s - start)) <= tol
    assert np.max(np.abs(found.end_s - end)) <= tol
    assert np.all(found.end_s > found.start_s)
    assert np.all(np.diff(found.start_s) > 0)
    marks_s, spaces_s = found.durations_s()
    assert np.allclose(marks_s, found.end_s - found.start_s)
    assert np.allclose(spaces_s, found.start_s[1:] - found.end_s[:-1])
    assert np.all(found.peak_snr_db > 0)


def test_threshold_follows_a_fade(rng):
    # 12 dB fade: at its trough a dot still has E/N0 = 30 - 12 = 18 dB, where noncoherent
    # on-off keying errs with probability about exp(-E / 4 N0) / 2 = 7e-8 (J. G. Proakis,
    # Digital Communications, noncoherent OOK; from memory): all 120 marks are found
    k = key(MESSAGE + " " + MESSAGE, wpm=20.0)
    base, start, end = keyed_baseband(rng, k, es_n0_db=30.0, fade_db=12.0, fade_period_s=8.0)
    env = bb.envelope(base, filter_s=k.dot_s, source="<test>")
    found = mk.find(env, window_s=25 * k.dot_s, min_mark_s=0.4 * k.dot_s,
                    min_space_s=0.4 * k.dot_s)
    assert found.n_marks == k.n_marks
    lv = found.levels
    t = lv.time_s
    gain = 10 ** (-12.0 / 20 * 0.5 * (1 - np.cos(2 * np.pi * t / 8.0)))
    # the threshold must sit between the noise and the faded mark level everywhere
    inside = (t > start[0]) & (t < end[-1])
    assert np.all(lv.threshold[inside] > lv.noise[inside])
    assert np.all(lv.threshold[inside] < 0.1 * gain[inside])
    # and it moves with the fade: 12 dB of fade moves it by several dB
    spread_db = 20 * np.log10(lv.threshold[inside].max() / lv.threshold[inside].min())
    assert spread_db > 6.0


@pytest.mark.parametrize("seed", range(3))
def test_noise_alone_gives_no_marks(seed):
    rng = np.random.default_rng(seed)
    n = int(20 * RATE_HZ)
    z = (0.01 * (rng.standard_normal(n) + 1j * rng.standard_normal(n))).astype(np.complex64)
    base = bb.Baseband(samples=z, rate_hz=RATE_HZ, start_s=0.0, carrier_hz=700.0, channel=0,
                       duration_s=n / RATE_HZ, half_band_hz=250.0)
    env = bb.envelope(base, filter_s=0.06, source="<test>")
    found = mk.find(env, window_s=1.5, min_mark_s=0.024, min_space_s=0.024)
    # Rayleigh exceedance of the p_fa = 1e-3 level by 3 % of a window's samples has a
    # vanishing probability (Proakis, Digital Communications, 2.3): no mark level at all
    assert found.n_marks == 0


def hand_envelope(magnitude: np.ndarray) -> bb.Envelope:
    return bb.Envelope(magnitude=magnitude, rate_hz=RATE_HZ, start_s=0.0, filter_s=0.005,
                       noise_bandwidth_hz=200.0, carrier_hz=700.0, source="<test>")


def test_glitches_are_suppressed_relative_to_the_dot(rng):
    dot_s = 0.06
    t = np.arange(int(4.0 * RATE_HZ)) / RATE_HZ
    x = np.abs(0.01 * (rng.standard_normal(t.size) + 1j * rng.standard_normal(t.size)))
    marks_s = [(0.5, 0.68), (0.74, 0.80), (1.2, 1.38)]
    for a, b in marks_s:
        x[(t >= a) & (t < b)] += 1.0
    x[(t >= 0.58) & (t < 0.59)] = 0.0  # a 10 ms drop-out inside the first dash
    x[(t >= 1.0) & (t < 1.01)] += 1.0  # a 10 ms click in a space
    env = hand_envelope(x)
    raw = mk.find(env, window_s=1.0)
    assert raw.n_marks == 5  # the drop-out splits a dash, the click is a mark
    clean = mk.find(env, window_s=1.0, min_mark_s=0.4 * dot_s, min_space_s=0.4 * dot_s)
    assert clean.n_marks == 3
    assert np.allclose(clean.start_s, [a for a, _ in marks_s], atol=2 / RATE_HZ)
    assert np.allclose(clean.end_s, [b for _, b in marks_s], atol=2 / RATE_HZ)
