"""Tests of stage 1 (okdecode.baseband): decimation chain, streaming state, carrier search."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from okdecode import baseband as bb
from okdecode.capture import from_array
from okdecode.synth import Station, synth

EPS32 = float(np.finfo(np.float32).eps)  # numpy: the chain computes in float32
RATES_HZ = [8000.0, 11025.0, 44100.0, 48000.0, 192000.0]


def cut_points(rng: np.random.Generator, n: int, k: int = 25) -> list[int]:
    """Random cut points in [0, n], repeated ones (empty blocks) and both ends included."""
    inner = rng.integers(0, n + 1, k)
    return sorted([0, 0, n, n, *inner, *inner[:3]])


def stage_taps(rate_hz: float) -> list[tuple[float, np.ndarray]]:
    """(input rate, taps) of each stage of the chain a Downconverter builds at rate_hz."""
    out, rate = [], rate_hz
    for factor in bb.plan_decimation(rate_hz):
        out.append((rate, bb.design_stage(rate, factor, bb.BASEBAND_HALF_BAND_HZ)))
        rate /= factor
    return out


def chain_response(rate_hz: float, freq_hz: np.ndarray) -> np.ndarray:
    """Complex response of the decimation chain at input frequencies, from scipy.signal.freqz.

    Each stage filters at its own input rate; a tone keeps its (possibly folded) frequency,
    and freqz is periodic in each stage's rate, so the product is the whole chain's gain.
    """
    h = np.ones(freq_hz.size, dtype=complex)
    for rate, taps in stage_taps(rate_hz):
        _, hk = signal.freqz(taps, worN=freq_hz, fs=rate)
        # linear phase: remove the stage's delay (the chain reports it in start_s)
        h *= hk * np.exp(2j * np.pi * freq_hz * (taps.size - 1) / 2 / rate)
    return h


# --- FIR decimator -----------------------------------------------------------------------


@pytest.mark.parametrize("factor", [2, 5, 10, 14, 16])
def test_fir_decimator_equals_scipy_lfilter_then_downsampling(rng, factor):
    taps = bb.design_stage(8000.0 * factor / 10, factor, 250.0)
    x = rng.standard_normal(6000).astype(np.float32)
    y = bb.FirDecimator(taps, factor).process(x)
    n_branches = -(-taps.size // factor)
    # the documented form y[m] = sum_i h[i] x[m D + D - 1 - i] on a zero-padded filter
    # is scipy.signal.lfilter's output kept every D samples from D - 1 - padding
    first = factor - 1 - (n_branches * factor - taps.size)
    ref = signal.lfilter(taps, 1.0, x.astype(np.float64))[first::factor]
    n = min(y.size, ref.size)
    assert n >= x.size // factor - n_branches
    # float32 sums of len(taps) products: error below len(taps) * eps * sum|h| * max|x|
    bound = taps.size * EPS32 * np.abs(taps).sum() * np.abs(x).max()
    assert np.max(np.abs(y[:n] - ref[:n])) <= bound


@pytest.mark.parametrize("factor", [4, 10, 16])
def test_fir_decimator_split_anywhere_matches_one_pass(rng, factor):
    taps = bb.design_stage(16000.0, factor, 250.0)
    x = rng.standard_normal(20000).astype(np.float32)
    whole = bb.FirDecimator(taps, factor).process(x)
    dec = bb.FirDecimator(taps, factor)
    cuts = cut_points(rng, x.size)
    parts = [dec.process(x[a:b]) for a, b in zip(cuts[:-1], cuts[1:], strict=True)]
    pieces = np.concatenate(parts)
    assert pieces.size == whole.size
    bound = taps.size * EPS32 * np.abs(taps).sum() * np.abs(x).max()  # float32 rounding
    assert np.max(np.abs(pieces - whole)) <= bound


# --- Downconverter: streaming state ------------------------------------------------------


@pytest.mark.parametrize("rate_hz", [8000.0, 48000.0])
@pytest.mark.parametrize("is_complex", [False, True])
def test_downconverter_split_anywhere_matches_one_pass(rng, rate_hz, is_complex):
    n = int(0.6 * rate_hz)
    x = rng.standard_normal(n)
    if is_complex:
        x = x + 1j * rng.standard_normal(n)
    carrier = 1234.5 if not is_complex else -987.0

    def make():
        return bb.Downconverter(rate_hz=rate_hz, carrier_hz=carrier, is_complex=is_complex)

    one = make()
    whole = np.concatenate([one.process(x), one.flush()])
    dc = make()
    cuts = cut_points(rng, n)
    parts = [dc.process(x[a:b]) for a, b in zip(cuts[:-1], cuts[1:], strict=True)]
    pieces = np.concatenate([*parts, dc.flush()])
    assert pieces.size == whole.size
    assert pieces.size >= n // int(np.prod(dc.factors))
    # float32 rounding of the oscillator and of each stage's sums (numpy float32 eps)
    bound = sum(t.size for _, t in stage_taps(rate_hz)) * EPS32 * 8 * np.abs(x).max()
    assert np.max(np.abs(pieces - whole)) <= bound


# --- Downconverter against scipy.signal references ---------------------------------------


@pytest.mark.parametrize("rate_hz", RATES_HZ)
def test_chain_passband_flat_and_aliases_rejected(rate_hz):
    factors = bb.plan_decimation(rate_hz)
    out_hz = rate_hz / np.prod(factors)
    half = bb.BASEBAND_HALF_BAND_HZ
    assert bb.BASEBAND_MIN_HZ <= out_hz < 2 * bb.BASEBAND_MIN_HZ
    assert half < out_hz / 2
    f = np.linspace(-rate_hz / 2, rate_hz / 2, 40001)
    gain_db = 20 * np.log10(np.maximum(np.abs(chain_response(rate_hz, f)), 1e-12))
    passband = np.abs(f) <= half
    # scipy.signal.freqz of the taps: flat within 0.1 dB up to 250 Hz (issue 2)
    assert np.max(np.abs(gain_db[passband])) <= 0.1
    # what folds onto |f| < 250 Hz at the output rate, from outside the passband
    folded = (f + out_hz / 2) % out_hz - out_hz / 2
    alias = (np.abs(folded) < half) & (np.abs(f) > out_hz - half)
    assert alias.any()
    # alias rejection at least 70 dB (issue 2)
    assert np.max(gain_db[alias]) <= -70.0


@pytest.mark.parametrize("rate_hz", [8000.0, 11025.0, 48000.0])
@pytest.mark.parametrize("offset_hz", [0.0, 90.0, -180.0, 250.0])
def test_measured_response_and_delay_match_freqz(rate_hz, offset_hz):
    carrier = 1000.0
    dc = bb.Downconverter(rate_hz=rate_hz, carrier_hz=carrier, is_complex=True)
    n = int(1.0 * rate_hz)
    t = np.arange(n) / rate_hz
    x = np.exp(2j * np.pi * (carrier + offset_hz) * t)
    y = np.concatenate([dc.process(x), dc.flush()]).astype(np.complex128)
    t_out = dc.start_s + np.arange(y.size) / dc.out_rate_hz
    steady = (t_out > 0.2) & (t_out < 0.8)
    # the tone mixed to offset_hz, at the output's own times (start_s), times H(offset)
    expected = chain_response(rate_hz, np.array([offset_hz]))[0]
    ideal = expected * np.exp(2j * np.pi * offset_hz * t_out[steady])
    # float32 arithmetic: errors of about 1e-5 of full scale (numpy float32 eps * taps)
    assert np.max(np.abs(y[steady] - ideal)) < 1e-4
    assert 20 * np.log10(np.median(np.abs(y[steady]))) == pytest.approx(
        20 * np.log10(abs(expected)), abs=0.01)


@pytest.mark.parametrize("rate_hz", [8000.0, 48000.0])
def test_measured_alias_is_rejected(rate_hz):
    dc = bb.Downconverter(rate_hz=rate_hz, carrier_hz=0.0, is_complex=True)
    # a tone that folds onto +100 Hz at the output rate
    f_alias = dc.out_rate_hz + 100.0
    n = int(1.0 * rate_hz)
    x = np.exp(2j * np.pi * f_alias * np.arange(n) / rate_hz)
    y = np.concatenate([dc.process(x), dc.flush()])
    t_out = dc.start_s + np.arange(y.size) / dc.out_rate_hz
    steady = (t_out > 0.2) & (t_out < 0.8)
    level_db = 20 * np.log10(np.sqrt(np.mean(np.abs(y[steady]) ** 2)))
    assert level_db <= -70.0  # alias rejection at least 70 dB (issue 2)
    # and it is what scipy.signal.freqz of the taps says, to float32's noise floor
    model_db = 20 * np.log10(abs(chain_response(rate_hz, np.array([f_alias]))[0]))
    assert level_db <= max(model_db + 1.0, -110.0)


def test_real_input_gives_half_amplitude_at_baseband():
    rate_hz, carrier, offset = 8000.0, 700.0, 40.0
    dc = bb.Downconverter(rate_hz=rate_hz, carrier_hz=carrier, is_complex=False)
    t = np.arange(int(rate_hz)) / rate_hz
    y = np.concatenate([dc.process(np.cos(2 * np.pi * (carrier + offset) * t)), dc.flush()])
    t_out = dc.start_s + np.arange(y.size) / dc.out_rate_hz
    steady = (t_out > 0.2) & (t_out < 0.8)
    # cos = (e^{jwt} + e^{-jwt}) / 2: the positive side lands at +offset with amplitude 1/2,
    # the negative side at -(2 carrier + offset) is filtered off (numpy/scipy reference)
    expected = 0.5 * chain_response(rate_hz, np.array([offset]))[0]
    ideal = expected * np.exp(2j * np.pi * offset * t_out[steady])
    assert np.max(np.abs(y[steady] - ideal)) < 1e-3 * 0.5


# --- carrier search ----------------------------------------------------------------------


def keyed_search(samples, rate_hz, **kw):
    return bb.search_carriers(from_array(samples, rate_hz), **kw)


@pytest.mark.parametrize(("seed", "hum_hz"), [(1, 50.0), (2, 60.0), (3, 50.0)])
def test_search_finds_keyed_carrier_beside_a_stronger_steady_one_and_hum(seed, hum_hz):
    rec = synth("XQ7ZB TEST 73", wpm=20, carrier_hz=900.0, cn0_dbhz=35.0, seed=seed,
                stations=(Station(carrier_hz=1500.0, level_db=10.0),), hum_hz=hum_hz,
                hum_db=10.0)
    spec = keyed_search(rec.samples, rec.rate_hz)
    assert spec.carriers, "the keyed carrier was not found"
    best = spec.carriers[0]
    # the strongest keyed candidate is the message, within a search bin of its frequency
    assert abs(best.frequency_hz - 900.0) <= spec.bin_hz
    for c in spec.carriers:
        # neither the steady carrier 10 dB stronger nor the hum or its harmonics is keyed
        assert abs(c.frequency_hz - 1500.0) > 2 * spec.bin_hz
        assert min(abs(c.frequency_hz - hum_hz * k) for k in range(1, 6)) > 2 * spec.bin_hz


@pytest.mark.parametrize("hum_hz", [50.0, 60.0])
def test_search_ignores_hum_and_its_harmonics(hum_hz):
    rec = synth("", duration_s=8.0, cn0_dbhz=40.0, hum_hz=hum_hz, hum_db=0.0, seed=4)
    spec = keyed_search(rec.samples, rec.rate_hz)
    assert spec.carriers == ()


@pytest.mark.parametrize("seed", range(6))
def test_search_finds_nothing_in_noise(seed):
    rec = synth("", duration_s=8.0, cn0_dbhz=30.0, amplitude=0.05, seed=seed)
    spec = keyed_search(rec.samples, rec.rate_hz)
    # the search's threshold is Bonferroni-corrected to 1 % false alarms per recording
    assert spec.carriers == ()
    assert spec.threshold >= 4.0


def test_search_ignores_a_steady_carrier():
    rec = synth("", duration_s=8.0, cn0_dbhz=45.0, seed=5,
                stations=(Station(carrier_hz=1100.0, level_db=0.0),))
    assert keyed_search(rec.samples, rec.rate_hz).carriers == ()


@pytest.mark.parametrize("is_complex", [False, True])
def test_keying_search_split_anywhere_matches_one_pass(rng, is_complex):
    rec = synth("XQ7ZB 73", wpm=25, carrier_hz=800.0, cn0_dbhz=35.0, seed=6, iq=is_complex)
    quiet = synth("", duration_s=rec.truth.duration_s, cn0_dbhz=35.0, seed=7, iq=is_complex,
                  amplitude=rec.truth.amplitude)
    n = min(rec.samples.size, quiet.samples.size)
    x = np.stack([quiet.samples[:n], rec.samples[:n]], axis=1)  # channel 1 holds the message

    def run(cuts):
        ks = bb.KeyingSearch(rate_hz=rec.rate_hz, n_channels=2, is_complex=is_complex)
        for a, b in zip(cuts[:-1], cuts[1:], strict=True):
            ks.process(x[a:b])
        return ks.result()

    one = run([0, n])
    pieces = run(cut_points(rng, n))
    assert pieces.n_frames == one.n_frames
    # float32 spectra summed in other groupings: relative error of some eps32 * n_frames
    assert np.allclose(pieces.power_dbfs, one.power_dbfs, atol=1e-3)
    assert np.allclose(pieces.score, one.score, rtol=1e-3, atol=1e-3)
    assert [(c.channel, round(c.frequency_hz, 1)) for c in pieces.carriers] == [
        (c.channel, round(c.frequency_hz, 1)) for c in one.carriers]
    assert one.carriers and one.carriers[0].channel == 1
