"""Raw I/Q reader: every SigMF datatype round trip, scaling, inference, errors, decoding."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from okdecode.capture import open_capture
from okdecode.capture.iq import EXTENSIONS, FORMAT_NAMES, sample_format
from okdecode.errors import CaptureError, ParameterError

COMPLEX_FORMATS = [n for n in FORMAT_NAMES if n.startswith("c")]
CENTER_HZ = 7.030e6  # an invented tuning, for absolute frequencies


def _codes(name: str, n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Stored components of n samples in format `name`, and their values by the rule.

    The rule is written out here, apart from the reader: SigMF v1.2 "Dataset format"
    names <c|r><f|i|u><bits>[_le|_be]; fixed-point full scale is 1.0 with signed codes
    divided by 2**(bits-1) and unsigned codes offset-binary around (2**bits - 1) / 2
    (for cu8, (byte - 127.5) / 127.5: issue 3, common practice for 8-bit receivers).
    """
    kind, base = name[0], name[1]
    bits = int(name[2:].split("_")[0])
    order = "" if bits == 8 else (">" if name.endswith("_be") else "<")
    per = 2 * n if kind == "c" else n
    if base == "f":
        dtype = np.dtype(f"{order}f{bits // 8}")
        stored = rng.uniform(-1, 1, per).astype(dtype)
        value = stored.astype(np.float64)
    elif base == "i":
        dtype = np.dtype(f"{order or '|'}i{bits // 8}")
        info = np.iinfo(dtype)
        stored = rng.integers(info.min, info.max, per, endpoint=True).astype(dtype)
        stored[:2] = info.min, info.max  # the extremes
        value = stored.astype(np.float64) / 2.0 ** (bits - 1)
    else:
        dtype = np.dtype(f"{order or '|'}u{bits // 8}")
        info = np.iinfo(dtype)
        stored = rng.integers(0, info.max, per, endpoint=True).astype(dtype)
        stored[:2] = 0, info.max
        mid = (2.0**bits - 1) / 2
        value = (stored.astype(np.float64) - mid) / mid
    if kind == "c":
        value = value[0::2] + 1j * value[1::2]
    return stored, value


def _read_all(path: Path, block_len: int = 1 << 18, **options) -> np.ndarray:
    cap = open_capture(path, **options)
    return np.concatenate(list(cap.blocks(block_len)))


@pytest.mark.parametrize("name", FORMAT_NAMES)
def test_every_format_round_trips(name, tmp_path, rng):
    stored, value = _codes(name, 1000, rng)
    path = tmp_path / "capture.raw"
    stored.tofile(path)
    cap = open_capture(path, iq_format=name, rate_hz=48000.0)
    got = np.concatenate(list(cap.blocks()))[:, 0]
    assert cap.kind == "iq" and cap.n_samples == 1000 and cap.n_channels == 1
    assert cap.is_complex == name.startswith("c")
    # the reader computes in float32 (float64 for 64-bit floats): values of magnitude <= 1
    # agree to within one unit in the last place at 1.0, 2**-23 (IEEE 754 binary32)
    tol = 0.0 if "f64" in name else 2.0**-23
    np.testing.assert_allclose(got, value, rtol=0, atol=tol)
    if name.endswith("_le") and not name.startswith(("cf64", "rf64")):
        assert got.dtype in (np.complex64, np.float32)


def test_cu8_scaling_is_offset_binary_around_127_5(tmp_path):
    # issue 3: cu8 is offset-binary around 127.5, value = (byte - 127.5) / 127.5
    path = tmp_path / "x.cu8"
    np.array([0, 255, 127, 128, 255, 0], dtype=np.uint8).tofile(path)
    got = _read_all(path, rate_hz=2.048e6)[:, 0]
    expected = np.array([-1 + 1j, -0.5 / 127.5 + 0.5j / 127.5, 1 - 1j])
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-7)


def test_byte_orders_read_the_same_samples(tmp_path, rng):
    z = (rng.normal(size=500) + 1j * rng.normal(size=500)) / 8
    for name, dtype in (("cf32_le", "<c8"), ("cf32_be", ">c8"), ("cf64_le", "<c16"),
                        ("cf64_be", ">c16")):
        z.astype(dtype).tofile(tmp_path / name)
    np.testing.assert_allclose(_read_all(tmp_path / "cf32_le", iq_format="cf32_le", rate_hz=1e3),
                               _read_all(tmp_path / "cf32_be", iq_format="cf32_be", rate_hz=1e3))
    np.testing.assert_array_equal(_read_all(tmp_path / "cf64_le", iq_format="cf64_le", rate_hz=1e3),
                                  _read_all(tmp_path / "cf64_be", iq_format="cf64_be", rate_hz=1e3))


@pytest.mark.parametrize("block_len", [1, 7, 256, 1000, 4096])
def test_any_block_length_gives_the_same_samples(block_len, tmp_path, rng):
    stored, value = _codes("ci16_le", 1000, rng)
    path = tmp_path / "x.cs16"
    stored.tofile(path)
    cap = open_capture(path, rate_hz=1e6)
    blocks = list(cap.blocks(block_len))
    assert all(0 < b.shape[0] <= block_len for b in blocks)
    np.testing.assert_allclose(np.concatenate(blocks)[:, 0], value, rtol=0, atol=0)
    # a capture reads again from the start on every call
    np.testing.assert_array_equal(np.concatenate(list(cap.blocks(block_len))),
                                  np.concatenate(blocks))


@pytest.mark.parametrize(("suffix", "name"), sorted(EXTENSIONS.items()))
def test_format_inferred_from_extension_says_so(suffix, name, tmp_path):
    path = tmp_path / f"capture{suffix}"
    fmt = sample_format(name)
    path.write_bytes(bytes(4 * fmt.sample_bytes))
    cap = open_capture(path, rate_hz=1e6)
    assert cap.kind == "iq" and cap.n_samples == 4
    assert any(name in note and "inferred" in note for note in cap.notes)


def test_given_format_wins_over_extension(tmp_path):
    path = tmp_path / "capture.cu8"
    np.zeros(8, dtype="<i2").tofile(path)
    cap = open_capture(path, iq_format="ci16_le", rate_hz=1e6)
    assert cap.n_samples == 4 and not any("inferred" in n for n in cap.notes)


@pytest.mark.parametrize("name", ["site3.iq", "site3.raw", "site3.bin", "site3"])
def test_ambiguous_raw_file_asks_for_the_format(name, tmp_path):
    path = tmp_path / name
    path.write_bytes(bytes(range(256)) * 4)
    with pytest.raises(CaptureError, match=rf"^{path}: .*--iq-format"):
        open_capture(path, rate_hz=1e6)


def test_raw_iq_without_rate_says_pass_rate(tmp_path):
    # issue 3: the message says which option is needed
    path = tmp_path / "site3.cf32"
    np.zeros(16, dtype=np.complex64).tofile(path)
    with pytest.raises(CaptureError, match=rf"^{path}: raw I/Q has no sample rate; pass --rate HZ"):
        open_capture(path)


@pytest.mark.parametrize(("name", "n_bytes"), [("cf32_le", 12), ("ci16_le", 6), ("cu8", 3),
                                               ("cf64_be", 24)])
def test_byte_count_that_does_not_fit_the_format(name, n_bytes, tmp_path):
    path = tmp_path / "odd.iq"
    assert n_bytes % sample_format(name).sample_bytes  # not a whole number of samples
    path.write_bytes(bytes(n_bytes))
    with pytest.raises(CaptureError, match=rf"^{path}: \d+ bytes is not a whole number of {name}"):
        open_capture(path, iq_format=name, rate_hz=1e6)


@pytest.mark.parametrize("bad", ["ci12", "cf16_le", "ci16", "float", "cu8_le"])
def test_unknown_format_name_is_a_parameter_error(bad, tmp_path):
    path = tmp_path / "x.iq"
    path.write_bytes(bytes(64))
    with pytest.raises(ParameterError, match=rf"^{path}: I/Q format '{bad}' is unknown"):
        open_capture(path, iq_format=bad, rate_hz=1e6)


def test_missing_byte_order_is_hinted(tmp_path):
    path = tmp_path / "x.iq"
    path.write_bytes(bytes(64))
    with pytest.raises(ParameterError, match="ci16_le or _be"):
        open_capture(path, iq_format="ci16", rate_hz=1e6)


@pytest.mark.parametrize("rate", [0, -1.0, float("nan"), float("inf"), "fast"])
def test_absurd_rate_is_a_parameter_error(rate, tmp_path):
    path = tmp_path / "x.cf32"
    np.zeros(4, dtype=np.complex64).tofile(path)
    with pytest.raises(ParameterError, match=rf"^{path}: sample rate"):
        open_capture(path, rate_hz=rate)


def test_nan_in_float_samples_is_named_when_read(tmp_path):
    path = tmp_path / "x.cf32"
    z = np.zeros(100, dtype=np.complex64)
    z[61] = complex(np.nan, 0)
    z.tofile(path)
    cap = open_capture(path, rate_hz=1e3)
    with pytest.raises(CaptureError, match=rf"^{path}: sample 61 is not finite"):
        list(cap.blocks(16))


def test_center_frequency_is_kept(tmp_path):
    path = tmp_path / "x.cu8"
    path.write_bytes(bytes(64))
    assert open_capture(path, rate_hz=2.048e6, center_hz=CENTER_HZ).center_hz == CENTER_HZ
    with pytest.raises(ParameterError, match=rf"^{path}: centre frequency"):
        open_capture(path, rate_hz=2.048e6, center_hz=float("nan"))


# ---------------------------------------------------------------------------------------
# Decoding through the generator


def _store(samples: np.ndarray, name: str, path: Path) -> None:
    """Write complex samples (full scale 1.0) in a SigMF datatype, rounding codes."""
    fmt = sample_format(name)
    comps = np.empty(2 * samples.size)
    comps[0::2], comps[1::2] = samples.real, samples.imag
    if fmt.component.kind == "f":
        comps.astype(fmt.component).tofile(path)
        return
    codes = np.round(comps / fmt.scale + fmt.offset)
    info = np.iinfo(fmt.component)
    assert codes.min() >= info.min and codes.max() <= info.max  # nothing clips
    codes.astype(fmt.component).tofile(path)


@pytest.fixture(scope="module")
def recordings():
    from okdecode.synth import synth

    # I/Q carriers on both sides of the centre; C/N0 as the generator defines it for
    # complex baseband, A² / (s² / fs) with complex noise of total variance s² (issue 3)
    return {sign: synth("XQ7ZB DE", wpm=25, carrier_hz=sign * 3000.0, rate_hz=48000.0,
                        cn0_dbhz=40.0, iq=True, seed=11 if sign > 0 else 12)
            for sign in (1, -1)}


@pytest.mark.parametrize(("name", "sign"), [
    ("cu8", 1), ("ci8", -1), ("ci16_le", 1), ("ci16_be", -1), ("cu16_le", -1),
    ("ci32_le", 1), ("cf32_le", -1), ("cf32_be", 1), ("cf64_le", 1),
])
def test_decodes_every_format_with_offsets_of_both_signs(name, sign, recordings, tmp_path):
    from okdecode.receiver import decode_file

    rec = recordings[sign]
    path = tmp_path / f"pass.{name}"
    _store(rec.samples, name, path)
    result = decode_file(path, rate_hz=rec.rate_hz, iq_format=name, center_hz=CENTER_HZ)
    assert result.text == rec.truth.text
    # the carrier is reported at its absolute frequency, centre + offset: within 5 Hz, small
    # beside the 1/T = 42 Hz detection bandwidth of a 25 WPM dot (T = 1.2 / 25 s, issue 2),
    # so a wrong sign or a lost centre frequency (kHz away) fails
    assert abs(result.carrier_hz - (CENTER_HZ + sign * 3000.0)) < 5.0
    # issue 2: C/N0 within 1 dB of the generator's for every case
    assert abs(result.cn0_dbhz - rec.truth.cn0_dbhz) < 1.0
