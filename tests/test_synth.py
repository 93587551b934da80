"""Tests of the signal generator against the standards and textbook facts it claims."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
import soundfile
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal

from okdecode.errors import ParameterError
from okdecode.synth import Scenario, Station, Synthesizer, key, synth, synth_file
from okdecode.text import TABLE, canonical, decode_pattern

REPEATABLE = settings(derandomize=True, deadline=None, max_examples=40)


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20_240_601)


def gaps(k) -> np.ndarray:
    """Key-up intervals between the marks of a keying, s."""
    return k.start_s[1:] - k.end_s[:-1]


# --- timing -----------------------------------------------------------------------------


@pytest.mark.parametrize("wpm", [5.0, 12.0, 20.0, 33.0, 50.0])
def test_paris_is_50_units_so_dot_is_1_2_over_wpm(wpm):
    k = key("PARIS " * 4, wpm=wpm)
    # PARIS = 50 units with its word gap (common practice), so dot_s = 1.2 / WPM
    assert k.dot_s == pytest.approx(1.2 / wpm, rel=1e-12)
    # four words take 4 * 60 / WPM seconds; the last word gap is not keyed
    assert k.end_s[-1] - k.start_s[0] + 7 * k.dot_s == pytest.approx(4 * 60 / wpm, rel=1e-12)
    assert (k.end_s - k.start_s)[0] == pytest.approx(1.2 / wpm, rel=1e-12)  # P starts with a dot


def test_paris_elements_follow_itu_timing():
    k = key("PARIS", wpm=20)
    # ITU-R M.1677-1 (2009), part I: P .--. A .- R .-. I .. S ... ; dash 3 units, gaps 1/3
    marks = [1, 3, 3, 1, 1, 3, 1, 3, 1, 1, 1, 1, 1, 1]
    spaces = [1, 1, 1, 3, 1, 3, 1, 1, 3, 1, 3, 1, 1]
    assert np.allclose((k.end_s - k.start_s) / k.dot_s, marks, atol=1e-9)
    assert np.allclose(gaps(k) / k.dot_s, spaces, atol=1e-9)
    assert list(k.units) == marks
    assert k.chars == ("P", "A", "R", "I", "S")


def test_word_gap_is_7_units():
    k = key("E E", wpm=15)
    # ITU-R M.1677-1 (2009), part I, section 2: words are separated by seven units
    assert gaps(k) / k.dot_s == pytest.approx([7.0], abs=1e-9)


@pytest.mark.parametrize("char", sorted(TABLE))
def test_every_table_character_keys_to_its_signal(char):
    k = key(char, wpm=20)
    # ITU-R M.1677-1 (2009): a dash is 3 dots, the gap inside a character 1 dot
    pattern = "".join("." if d < 2 * k.dot_s else "-" for d in k.end_s - k.start_s)
    assert pattern == TABLE[char]
    assert np.allclose(gaps(k), k.dot_s, atol=1e-12)
    assert k.chars == (char.upper(),) and k.char_start_s.size == 1


@pytest.mark.parametrize(("char_wpm", "wpm"), [(18.0, 5.0), (20.0, 10.0), (25.0, 8.0)])
def test_farnsworth_gaps_follow_bloom(char_wpm, wpm):
    k = key("PARIS PARIS", wpm=wpm, char_wpm=char_wpm)
    # J. Bloom, QEX 1990: ta = (60 c - 37.2 s) / (s c); char gap 3 ta / 19, word gap 7 ta / 19
    ta = (60 * char_wpm - 37.2 * wpm) / (wpm * char_wpm)
    between = k.char_start_s[1:] - k.char_end_s[:-1]
    assert between[:4] == pytest.approx([3 * ta / 19] * 4, rel=1e-12)
    assert between[4] == pytest.approx(7 * ta / 19, rel=1e-12)
    # the characters keep the character speed: dot 1.2 / c
    assert (k.end_s - k.start_s)[0] == pytest.approx(1.2 / char_wpm, rel=1e-12)
    # PARIS still takes 60 / s seconds, word gap included (Bloom)
    assert k.char_start_s[5] - k.char_start_s[0] == pytest.approx(60 / wpm, rel=1e-12)


def test_dash_dot_ratio_sets_the_dash():
    k = key("A", wpm=20, dash_dot_ratio=3.3)
    assert (k.end_s - k.start_s) / k.dot_s == pytest.approx([1.0, 3.3], rel=1e-12)


def test_weight_moves_time_from_spaces_to_marks():
    plain, heavy = key("PARIS", wpm=20), key("PARIS", wpm=20, weight=0.1)
    # weighting lengthens each mark and shortens the gap after it alike (common practice)
    assert heavy.end_s - heavy.start_s == pytest.approx(plain.end_s - plain.start_s + 0.1 * 0.06)
    assert gaps(heavy) == pytest.approx(gaps(plain) - 0.1 * 0.06)
    assert heavy.start_s == pytest.approx(plain.start_s, abs=1e-12)


def test_jitter_has_the_asked_spread():
    message = "THE QUICK BROWN FOX JUMPS OVER THE LAZY DOG 0123456789 " * 3
    plain, shaky = key(message, wpm=20), key(message, wpm=20, jitter=0.1, seed=5)
    relative = (shaky.end_s - shaky.start_s) / (plain.end_s - plain.start_s) - 1
    n = relative.size
    # the draws are Gaussian limited to 3 sigma; a normal truncated at +-c has variance
    # 1 - 2 c phi(c) / (2 Phi(c) - 1); the sample standard deviation of n draws has relative
    # spread 1 / sqrt(2 (n - 1))
    inside = math.erf(3 / math.sqrt(2))
    expected = 0.1 * math.sqrt(1 - 6 * math.exp(-4.5) / math.sqrt(2 * math.pi) / inside)
    assert abs(relative.std(ddof=1) / expected - 1) < 4 / math.sqrt(2 * (n - 1))
    assert abs(relative.mean()) < 4 * expected / math.sqrt(n)
    assert np.abs(relative).max() <= 0.3 + 1e-12
    again = key(message, wpm=20, jitter=0.1, seed=5)
    assert np.array_equal(again.start_s, shaky.start_s)


def test_speed_glides_from_start_to_end():
    k = key("PARIS " * 6, wpm=15, wpm_end=22)
    dots = (k.end_s - k.start_s)[k.units == 1]
    assert dots[0] == pytest.approx(1.2 / 15, rel=1e-12)  # dot_s = 1.2 / WPM at the start
    assert 1.2 / 22 < dots[-1] < 1.2 / 21.5  # nearly all of the message sent by then
    assert np.all(np.diff(dots) < 0)


@REPEATABLE
@given(
    tokens=st.lists(st.sampled_from([*sorted(TABLE), " "]), min_size=1, max_size=12),
    wpm=st.floats(5, 50),
)
def test_marks_classify_back_to_the_text(tokens, wpm):
    message = "".join(tokens)
    k = key(message, wpm=wpm)
    # ITU-R M.1677-1 (2009): marks of 1 and 3 units; gaps of 1, 3 and 7 units
    out, pattern = [], ""
    for i in range(k.n_marks):
        pattern += "." if (k.end_s[i] - k.start_s[i]) < 2 * k.dot_s else "-"
        gap = k.start_s[i + 1] - k.end_s[i] if i + 1 < k.n_marks else math.inf
        if gap > 2 * k.dot_s:
            out.append(decode_pattern(pattern))
            pattern = ""
            if gap > 5 * k.dot_s and i + 1 < k.n_marks:
                out.append(" ")
    assert "".join(out) == canonical(message) == k.text
    assert len(k.chars) == k.char_start_s.size == k.char_end_s.size


# --- levels -----------------------------------------------------------------------------


@pytest.mark.parametrize(("rate_hz", "cn0_dbhz"), [(8000.0, 40.0), (48000.0, 25.0)])
def test_real_noise_density_follows_the_cn0_definition(rate_hz, cn0_dbhz):
    amplitude = 0.01
    rec = synth("", rate_hz=rate_hz, cn0_dbhz=cn0_dbhz, amplitude=amplitude, duration_s=4.0)
    x = rec.samples
    # C/N0 = C / N0 with N0 the one-sided noise density (common practice): a tone of
    # amplitude A has C = A^2 / 2, noise of variance s^2 over 0..fs/2 has N0 = 2 s^2 / fs
    sigma2 = amplitude**2 * rate_hz / (4 * 10 ** (cn0_dbhz / 10))
    assert rec.truth.noise_rms == pytest.approx(math.sqrt(sigma2), rel=1e-12)
    # the sample variance of n Gaussians has relative standard deviation sqrt(2 / n)
    assert abs(x.var() / sigma2 - 1) < 5 * math.sqrt(2 / x.size)
    # scipy.signal.welch as reference: one-sided density, flat at N0 = 2 s^2 / fs
    _, psd = signal.welch(x, fs=rate_hz, nperseg=1024)
    inner = psd[1:-1]  # the end bins of a one-sided density hold half as much
    measured_cn0 = 10 * np.log10((amplitude**2 / 2) / inner.mean())
    assert measured_cn0 == pytest.approx(cn0_dbhz, abs=0.1)  # > 6 sd of the estimate
    # white: the upper half of the band holds as much as the lower (each mean has relative
    # spread about sqrt(2 / (n / 2)) over the n samples)
    halves = inner[: inner.size // 2].mean() / inner[inner.size // 2 :].mean()
    assert abs(halves - 1) < 10 * math.sqrt(4 / x.size)


def test_iq_noise_density_follows_the_cn0_definition():
    amplitude, rate_hz, cn0_dbhz = 0.01, 16000.0, 30.0
    rec = synth("", iq=True, rate_hz=rate_hz, cn0_dbhz=cn0_dbhz, amplitude=amplitude,
                duration_s=4.0)  # fmt: skip
    x = rec.samples
    assert x.dtype == np.complex128
    # complex baseband: C = A^2, N0 = E|n|^2 / fs over -fs/2..fs/2, so E|n|^2 = A^2 fs / (C/N0)
    sigma2 = amplitude**2 * rate_hz / 10 ** (cn0_dbhz / 10)
    assert abs(np.mean(np.abs(x) ** 2) / sigma2 - 1) < 5 * math.sqrt(1 / x.size)
    # circular: I and Q alike and uncorrelated
    assert abs(x.real.var() / x.imag.var() - 1) < 5 * math.sqrt(4 / x.size)
    assert abs(np.mean(x.real * x.imag)) < 5 * sigma2 / 2 / math.sqrt(x.size)
    _, psd = signal.welch(x, fs=rate_hz, nperseg=1024, return_onesided=False)
    assert 10 * np.log10(amplitude**2 / psd.mean()) == pytest.approx(cn0_dbhz, abs=0.1)


def test_keyed_down_carrier_has_power_a_squared_over_two():
    rec = synth("T", wpm=5, carrier_hz=1000.0, rate_hz=8000.0, amplitude=0.3)
    k = rec.truth.keying
    first = math.ceil((k.start_s[0] + 0.1) * rec.rate_hz)
    inside = rec.samples[first : first + 4000]  # 0.5 s: 500 whole cycles, inside the dash
    # a sine of amplitude A has mean power A^2 / 2
    assert np.mean(inside**2) == pytest.approx(0.3**2 / 2, rel=1e-9)
    assert rec.truth.carrier_dbfs == pytest.approx(20 * np.log10(0.3 / math.sqrt(2)))
    # numpy.fft as reference: the spectral peak lies at the carrier
    spectrum = np.abs(np.fft.rfft(inside))
    assert np.fft.rfftfreq(inside.size, 1 / rec.rate_hz)[spectrum.argmax()] == 1000.0
    before = math.floor((k.start_s[0] - rec.truth.scenario.rise_s) * rec.rate_hz)
    assert np.all(rec.samples[:before] == 0)


@REPEATABLE
@given(
    cn0_dbhz=st.one_of(st.none(), st.floats(10, 70)),
    rate_hz=st.sampled_from([8000.0, 11025.0, 48000.0]),
    iq=st.booleans(),
    hum_db=st.one_of(st.none(), st.floats(-30, 10)),
    clicks_per_s=st.sampled_from([0.0, 20.0]),
    agc_db=st.sampled_from([0.0, 12.0]),
    level_db=st.floats(-20, 12),
)
def test_automatic_amplitude_never_clips(cn0_dbhz, rate_hz, iq, hum_db, clicks_per_s, agc_db,
                                         level_db):  # fmt: skip
    rec = synth("EE", wpm=40, rate_hz=rate_hz, iq=iq, cn0_dbhz=cn0_dbhz, hum_db=hum_db,
                clicks_per_s=clicks_per_s, agc_db=agc_db, lead_s=0.05, tail_s=0.05,
                stations=(Station(-500.0 if iq else 1500.0, level_db=level_db),))  # fmt: skip
    peak = max(np.abs(rec.samples.real).max(), np.abs(rec.samples.imag).max())
    assert 0 < peak <= 0.9


def test_raised_cosine_edges_have_their_half_amplitude_at_the_truth():
    rec = synth("E", wpm=12, carrier_hz=2000.0, rate_hz=48000.0, rise_s=0.008, lead_s=0.2)
    k, amplitude, rise_s = rec.truth.keying, rec.truth.amplitude, 0.008
    # scipy.signal.hilbert as the reference envelope detector
    envelope = np.abs(signal.hilbert(rec.samples)) / amplitude
    t_s = np.arange(envelope.size) / rec.rate_hz
    rising = t_s[np.flatnonzero(envelope > 0.5)[0]]
    falling = t_s[np.flatnonzero(envelope > 0.5)[-1]]
    assert rising == pytest.approx(k.start_s[0], abs=2 / rec.rate_hz)
    assert falling == pytest.approx(k.end_s[0], abs=2 / rec.rate_hz)
    # (1 + sin(pi x / r)) / 2 passes 10 % and 90 % at x = -/+ r asin(0.8) / pi
    t10 = t_s[np.flatnonzero(envelope > 0.1)[0]]
    t90 = t_s[np.flatnonzero(envelope > 0.9)[0]]
    assert t90 - t10 == pytest.approx(2 * rise_s * math.asin(0.8) / math.pi, abs=3 / rec.rate_hz)
    middle = (t_s > k.start_s[0] + rise_s) & (t_s < k.end_s[0] - rise_s)
    assert envelope[middle] == pytest.approx(1.0, abs=1e-3)


def test_hard_keying_without_edges():
    rec = synth("E", rise_s=0.0, iq=True, carrier_hz=100.0, amplitude=0.5)
    k, t_s = rec.truth.keying, np.arange(rec.samples.size) / rec.rate_hz
    inside = (t_s >= k.start_s[0]) & (t_s < k.end_s[0])
    assert np.abs(rec.samples[inside]) == pytest.approx(0.5)
    assert np.all(rec.samples[~inside] == 0)


# --- channel and other signals ----------------------------------------------------------


def test_drift_moves_the_frequency_linearly_with_continuous_phase():
    rec = synth("TTT", wpm=5, iq=True, rate_hz=8000.0, carrier_hz=300.0, drift_hz=-80.0)
    k, x = rec.truth.keying, rec.samples
    t_s = (np.arange(x.size - 1) + 0.5) / rec.rate_hz
    # instantaneous frequency, the phase's derivative: angle(x[n+1] x*[n]) fs / 2 pi
    freq_hz = np.angle(x[1:] * np.conj(x[:-1])) * rec.rate_hz / (2 * np.pi)
    first, last = k.start_s[0], k.end_s[-1]
    expected_hz = 300.0 - 80.0 * np.clip((t_s - first) / (last - first), 0, 1)
    on = np.abs(x[1:]) * np.abs(x[:-1]) > 0.25 * rec.truth.amplitude**2
    assert freq_hz[on] == pytest.approx(expected_hz[on], abs=0.01)


def test_fading_has_the_asked_depth():
    rec = synth("T", wpm=1, iq=True, fading_db=15.0, fading_period_s=1.5, carrier_hz=50.0)
    k, t_s = rec.truth.keying, np.arange(rec.samples.size) / rec.rate_hz
    inside = (t_s > k.start_s[0] + 0.01) & (t_s < k.end_s[0] - 0.01)  # 3.6 s, over two periods
    level_db = 20 * np.log10(np.abs(rec.samples[inside]) / rec.truth.amplitude)
    assert level_db.max() == pytest.approx(0.0, abs=0.01)
    assert level_db.min() == pytest.approx(-15.0, abs=0.01)


def test_dropout_silences_the_carrier():
    rec = synth("T", wpm=5, iq=True, dropouts_s=((0.7, 0.1),))
    t_s = np.arange(rec.samples.size) / rec.rate_hz
    assert np.all(rec.samples[(t_s >= 0.7) & (t_s < 0.8)] == 0)
    assert np.all(np.abs(rec.samples[(t_s > 0.6) & (t_s < 0.69)]) > 0)


def test_stations_add_linearly_at_their_levels():
    other = Station(1200.0, level_db=6.0, message="XQ7ZB", wpm=28, start_s=0.3, jitter=0.05)
    steady = Station(3100.0, level_db=-10.0)
    common = {"amplitude": 0.05, "duration_s": 4.0, "seed": 11}
    both = synth("CQ", cn0_dbhz=30.0, stations=(other, steady), **common)
    alone = synth("CQ", cn0_dbhz=30.0, **common)
    stations = synth("", stations=(other, steady), **common)
    # the generator is linear before AGC: adding stations adds their signals, nothing else
    assert both.samples == pytest.approx(alone.samples + stations.samples, abs=1e-12)
    assert both.truth.others[0].chars == ("X", "Q", "7", "Z", "B")
    assert both.truth.others[0].start_s[0] == pytest.approx(0.3)
    assert both.truth.others[1] is None
    steady_only = synth("", stations=(steady,), iq=True, **common)
    assert np.abs(steady_only.samples) == pytest.approx(0.05 * 10 ** (-10 / 20))


def test_hum_has_its_fundamental_and_harmonics():
    rec = synth("", hum_hz=60.0, hum_db=-6.0, duration_s=1.0, rate_hz=8000.0, amplitude=0.1)
    # numpy.fft as reference: a line of amplitude a gives 2 |X| / N = a in a whole-cycle window
    lines = 2 * np.abs(np.fft.rfft(rec.samples)) / rec.samples.size
    fundamental = 0.1 * 10 ** (-6 / 20)
    assert [lines[60 * k] for k in range(1, 6)] == pytest.approx(
        [fundamental / k for k in range(1, 6)], rel=1e-9
    )
    assert np.delete(lines, [60 * k for k in range(1, 6)]).max() < 1e-12


def test_dc_offset_level():
    rec = synth("", dc_db=-20.0, amplitude=0.2, duration_s=0.5)
    assert rec.samples == pytest.approx(0.02)


def test_clicks_arrive_as_a_poisson_process_of_bounded_bursts():
    rec = synth("", clicks_per_s=5.0, click_db=6.0, amplitude=0.1, duration_s=40.0, seed=3)
    starts = rec.truth.click_start_s
    # a Poisson count of mean 200 has standard deviation sqrt(200)
    assert abs(starts.size - 200) < 5 * math.sqrt(200)
    assert np.all(np.diff(starts) >= 0)
    length = round(0.002 * rec.rate_hz)
    covered = np.zeros(rec.samples.size, dtype=bool)
    for start in np.round(starts * rec.rate_hz).astype(int):
        covered[start : start + length] = True
    assert np.all(rec.samples[~covered] == 0)
    peak = 0.1 * 10 ** (6 / 20)
    assert np.abs(rec.samples).max() <= peak + 1e-12
    # a burst is Gaussian noise of standard deviation peak / 4 decaying as exp(-3 m / L), so
    # independent bursts add sum(s_m^2) of energy each, with variance 2 sum(s_m^4) (Gaussian
    # fourth moment; the limit at 4 sigma takes off 0.1 %)
    s2 = (peak / 4 * np.exp(-3.0 * np.arange(length) / length)) ** 2
    energy = np.sum(rec.samples**2)
    expected = starts.size * s2.sum()
    assert abs(energy - expected) < 5 * math.sqrt(2 * starts.size * np.sum(s2**2))


def test_agc_swells_in_the_spaces_with_its_release_time():
    rec = synth("T", wpm=5, iq=True, carrier_hz=200.0, dc_db=-20.0, agc_db=12.0,
                agc_release_s=0.25, amplitude=0.01, tail_s=2.0)  # fmt: skip
    k, sc = rec.truth.keying, rec.truth.scenario
    dc = 0.01 * 10 ** (-20 / 20)
    t_s = np.arange(rec.samples.size) / rec.rate_hz
    gain_db = 20 * np.log10(np.abs(rec.samples) / dc)
    # before any carrier the AGC is wide open
    assert gain_db[t_s < k.start_s[0] - sc.rise_s] == pytest.approx(12.0, abs=1e-9)
    # after the mark the held level decays as exp(-t / release) from the falling edge's top
    after = t_s > k.end_s[0] + sc.rise_s
    top_s = math.floor((k.end_s[0] - sc.rise_s / 2) * rec.rate_hz) / rec.rate_hz
    expected_db = 12.0 * (1 - np.exp(-(t_s[after] - top_s) / 0.25))
    one_sample_db = 12.0 / (0.25 * rec.rate_hz)  # where the top lies is known to a sample
    assert gain_db[after] == pytest.approx(expected_db, abs=one_sample_db)
    # while keyed down the gain is 0 dB: the carrier keeps its amplitude
    inside = (t_s > k.start_s[0] + sc.rise_s) & (t_s < k.end_s[0] - sc.rise_s)
    assert np.abs(rec.samples[inside]) == pytest.approx(0.01, abs=dc)


# --- streaming, seeds, files ------------------------------------------------------------

BUSY = Scenario(
    "CQ DE XQ7ZB <AR>",
    wpm=22, cn0_dbhz=28.0, jitter=0.08, weight=0.05, fading_db=12.0, fading_period_s=1.0,
    drift_hz=40.0, dropouts_s=((1.0, 0.05),), hum_db=-12.0, dc_db=-15.0, clicks_per_s=4.0,
    agc_db=8.0, stations=(Station(840.0, message="TEST", wpm=30), Station(2900.0, level_db=9.0)),
    seed=4,
)  # fmt: skip


@pytest.mark.parametrize("iq", [False, True])
def test_blocks_split_anywhere_match_one_pass(rng, iq):
    scenario = dataclasses.replace(BUSY, iq=iq)
    synthesizer = Synthesizer(scenario)
    whole = synthesizer.read(synthesizer.n_samples)
    assert whole.size == synthesizer.n_samples and synthesizer.read(10).size == 0
    synthesizer.rewind()
    cuts = np.sort(rng.integers(0, whole.size, 40))
    cuts = np.concatenate(([0], cuts, cuts[:5], [whole.size]))  # repeats: empty blocks
    parts = [synthesizer.read(n) for n in np.diff(np.sort(cuts))]
    assert any(p.size == 0 for p in parts)
    # AGC works in the log domain: equal to rounding error, not bit for bit
    assert np.concatenate(parts) == pytest.approx(whole, rel=1e-12, abs=1e-15)


def test_seed_repeats_and_varies():
    a, b = synth("SOS", cn0_dbhz=30.0, jitter=0.1, seed=1), synth("SOS", cn0_dbhz=30.0, jitter=0.1,
                                                                  seed=1)  # fmt: skip
    c = synth("SOS", cn0_dbhz=30.0, jitter=0.1, seed=2)
    assert np.array_equal(a.samples, b.samples)
    assert not np.array_equal(a.truth.keying.start_s, c.truth.keying.start_s)


def test_noise_only_recording_has_the_asked_length():
    rec = synth("", duration_s=3.0, cn0_dbhz=30.0, rate_hz=11025.0)
    assert rec.samples.size == 3 * 11025 and rec.truth.text == ""
    assert rec.truth.keying.n_marks == 0 and rec.truth.keying.chars == ()
    assert rec.truth.duration_s == pytest.approx(3.0)


@pytest.mark.parametrize(("suffix", "subtype", "step"), [
    (".wav", None, 2.0**-15), (".flac", "PCM_24", 2.0**-23), (".wav", "PCM_U8", 2.0**-7),
    (".flac", "PCM_S8", 2.0**-7), (".wav", "FLOAT", 2.0**-24),
])  # fmt: skip
def test_synth_file_writes_what_synth_gives(tmp_path, suffix, subtype, step):
    options = {"wpm": 25, "cn0_dbhz": 35.0, "rate_hz": 11025.0, "seed": 9, "hum_db": -20.0}
    path = tmp_path / f"beacon{suffix}"
    truth = synth_file(path, "VVV XQ7ZB", subtype=subtype, block_n=777, **options)
    rec = synth("VVV XQ7ZB", **options)
    read, rate = soundfile.read(path)
    assert rate == 11025 and read.size == rec.samples.size == truth.n_samples
    # PCM: a step of 2^-(bits - 1), rounding to half a step, and libsndfile's 2^-(bits-1)
    # scale difference on writing; float32: 24-bit mantissa
    assert np.abs(read - rec.samples).max() <= step
    assert truth.text == rec.truth.text == "VVV XQ7ZB"


def test_synth_file_writes_iq_as_npy(tmp_path):
    path = tmp_path / "site3.npy"
    truth = synth_file(path, "XQ7ZB", iq=True, carrier_hz=-350.0, cn0_dbhz=40.0, block_n=1000)
    rec = synth("XQ7ZB", iq=True, carrier_hz=-350.0, cn0_dbhz=40.0)
    read = np.load(path, allow_pickle=False)
    assert read.dtype == np.complex64 and read.size == truth.n_samples
    assert read == pytest.approx(rec.samples, abs=2.0**-24)


# --- errors -----------------------------------------------------------------------------


@pytest.mark.parametrize("options", [
    {"wpm": 0}, {"wpm": float("nan")}, {"char_wpm": 10.0, "wpm": 20.0}, {"wpm_end": -1.0},
    {"dash_dot_ratio": 1.0}, {"weight": 0.5}, {"jitter": 0.5}, {"rate_hz": -8000.0},
    {"carrier_hz": 4000.0}, {"carrier_hz": 3900.0, "drift_hz": 200.0}, {"carrier_hz": -10.0},
    {"cn0_dbhz": float("inf")}, {"amplitude": 0.0}, {"rise_s": 0.05}, {"lead_s": 0.001},
    {"duration_s": -1.0}, {"fading_period_s": 0.0}, {"dropouts_s": ((1.0, -0.1),)},
    {"stations": (Station(5000.0),)}, {"stations": (Station(900.0, message="É", wpm=-2),)},
    {"stations": ("loud",)}, {"seed": -1}, {"seed": 1.5}, {"hum_db": float("nan")},
    {"clicks_per_s": -1.0}, {"agc_db": -3.0}, {"no_such_option": 1},
])  # fmt: skip
def test_bad_options_raise_parameter_error_naming_the_source(options):
    with pytest.raises(ParameterError, match=r"^<synth>: "):
        synth("E", **options)


def test_unknown_character_is_named():
    with pytest.raises(ParameterError, match=r"^<synth>: '#' has no signal"):
        synth("CQ #1")


def test_file_errors_name_the_file(tmp_path):
    with pytest.raises(ParameterError, match=r"^beacon\.mp4: cannot write '\.mp4'"):
        synth_file(tmp_path / "beacon.mp4", "E")
    with pytest.raises(ParameterError, match=r"^site3\.wav: I/Q samples in an audio file"):
        synth_file(tmp_path / "site3.wav", "E", iq=True)
    with pytest.raises(ParameterError, match=r"^odd\.flac: rate_hz 8000\.5"):
        synth_file(tmp_path / "odd.flac", "E", rate_hz=8000.5)
    with pytest.raises(ParameterError, match=r"^b\.flac: FLAC cannot hold subtype 'FLOAT'"):
        synth_file(tmp_path / "b.flac", "E", subtype="FLOAT")
    with pytest.raises(ParameterError, match=r"^missing\.wav: cannot be written"):
        synth_file(tmp_path / "no" / "such" / "missing.wav", "E")
    loud = tmp_path / "loud.wav"
    with pytest.raises(ParameterError, match=r"^loud\.wav: a sample of 2 clips in PCM_16"):
        synth_file(loud, "E", amplitude=2.0)
    assert not loud.exists()
    synth_file(tmp_path / "loud.wav", "E", amplitude=2.0, subtype="FLOAT")  # float may exceed 1
    assert soundfile.read(loud)[0].max() == pytest.approx(2.0, rel=1e-6)
