"""NumPy .npy reader: real and complex arrays, channels, scaling, refused inputs, decoding."""

from __future__ import annotations

import numpy as np
import pytest

from okdecode.capture import open_capture
from okdecode.errors import CaptureError


def _samples(cap, block_len: int = 1 << 18) -> np.ndarray:
    return np.concatenate(list(cap.blocks(block_len)))


@pytest.mark.parametrize("dtype", [np.float32, np.float64, np.complex64, np.complex128])
def test_float_and_complex_arrays_round_trip(dtype, tmp_path, rng):
    x = rng.normal(size=1000) / 4
    if np.dtype(dtype).kind == "c":
        x = x + 1j * rng.normal(size=1000) / 4
    x = x.astype(dtype)
    np.save(tmp_path / "a.npy", x)
    cap = open_capture(tmp_path / "a.npy", rate_hz=8000.0)
    assert cap.kind == "npy" and cap.is_complex == (x.dtype.kind == "c")
    got = _samples(cap, 333)
    assert type(got) is np.ndarray and got.shape == (1000, 1)
    np.testing.assert_array_equal(got[:, 0], x)  # floats are taken as they are


@pytest.mark.parametrize("order", ["C", "F"])
def test_channels_in_columns(order, tmp_path, rng):
    x = np.asarray(rng.normal(size=(500, 3)), order=order)
    np.save(tmp_path / "m.npy", x)
    cap = open_capture(tmp_path / "m.npy", rate_hz=1e3)
    assert cap.n_channels == 3 and cap.n_samples == 500
    np.testing.assert_array_equal(_samples(cap, 64), x)


def test_integer_arrays_are_scaled_to_full_scale(tmp_path):
    # as SigMF fixed point: signed codes / 2**(bits-1); unsigned around (2**bits - 1) / 2
    np.save(tmp_path / "i.npy", np.array([-32768, 0, 16384, 32767], dtype=np.int16))
    np.save(tmp_path / "u.npy", np.array([0, 255, 127, 128], dtype=np.uint8))
    np.testing.assert_allclose(_samples(open_capture(tmp_path / "i.npy", rate_hz=1.0))[:, 0],
                               [-1.0, 0.0, 0.5, 32767 / 32768], rtol=0, atol=2.0**-23)
    np.testing.assert_allclose(_samples(open_capture(tmp_path / "u.npy", rate_hz=1.0))[:, 0],
                               [-1.0, 1.0, -0.5 / 127.5, 0.5 / 127.5], rtol=0, atol=2.0**-23)


def test_object_array_is_refused_without_unpickling(tmp_path):
    path = tmp_path / "obj.npy"
    np.save(path, np.array([1.0, "x", None], dtype=object), allow_pickle=True)
    with pytest.raises(CaptureError, match=rf"^{path}: not a readable NumPy .npy file"):
        open_capture(path, rate_hz=1.0)


def test_no_rate_says_pass_rate(tmp_path):
    np.save(tmp_path / "a.npy", np.zeros(10))
    with pytest.raises(CaptureError, match=r"a.npy: a NumPy array has no sample rate; "
                                           "pass --rate HZ$"):
        open_capture(tmp_path / "a.npy")


@pytest.mark.parametrize(("array", "problem"), [
    (np.zeros((4, 4, 2)), r"array of shape \(4, 4, 2\)"),
    (np.zeros(0), r"array of shape \(0,\)"),
    (np.zeros((2, 4000)), r"array of shape \(2, 4000\): 4000 channels of 2 samples"),
    (np.array([True, False]), "array of bool"),
    (np.zeros(3, dtype=[("a", "f4"), ("b", "f4")]), "array of"),
])
def test_arrays_that_are_not_recordings(array, problem, tmp_path):
    path = tmp_path / "bad.npy"
    np.save(path, array)
    with pytest.raises(CaptureError, match=rf"^{path}: {problem}"):
        open_capture(path, rate_hz=1.0)


def test_not_npy_truncated_and_npz(tmp_path):
    text = tmp_path / "t.npy"
    text.write_text("0.1\n0.2\n")
    with pytest.raises(CaptureError, match=rf"^{text}: not a NumPy .npy file"):
        open_capture(text, rate_hz=1.0)
    short = tmp_path / "s.npy"
    np.save(short, np.zeros(100))
    short.write_bytes(short.read_bytes()[:-80])
    with pytest.raises(CaptureError, match=rf"^{short}: .*truncated"):
        open_capture(short, rate_hz=1.0)
    npz = tmp_path / "z.npz"
    np.savez(npz, a=np.zeros(4))
    with pytest.raises(CaptureError, match=rf"^{npz}: is a NumPy .npz archive"):
        open_capture(npz, rate_hz=1.0)


def test_nan_is_named_when_read(tmp_path):
    x = np.zeros(100, dtype=np.complex64)
    x[42] = complex(0, np.inf)
    np.save(tmp_path / "n.npy", x)
    cap = open_capture(tmp_path / "n.npy", rate_hz=1.0)
    with pytest.raises(CaptureError, match=r"n.npy: sample 42 is not finite"):
        _samples(cap, 10)


def test_iq_array_from_the_generator_decodes(tmp_path):
    from okdecode.receiver import decode_file
    from okdecode.synth import synth_file

    path = tmp_path / "iq.npy"
    truth = synth_file(path, "XQ7ZB DE", wpm=22, carrier_hz=1800.0, rate_hz=32000.0,
                       cn0_dbhz=40.0, iq=True, seed=31)
    result = decode_file(path, rate_hz=32000.0, center_hz=3.5e6)
    assert result.text == truth.text
    assert abs(result.carrier_hz - (3.5e6 + 1800.0)) < 5.0
