"""open_capture: choosing the reader by name and content, and checking options once."""

from __future__ import annotations

import numpy as np
import pytest
import soundfile

from okdecode.capture import open_capture
from okdecode.errors import CaptureError, ParameterError


def test_missing_folder_and_empty(tmp_path):
    with pytest.raises(CaptureError, match=rf"^{tmp_path / 'no.wav'}: no such file$"):
        open_capture(tmp_path / "no.wav")
    with pytest.raises(CaptureError, match=rf"^{tmp_path}: is a folder"):
        open_capture(tmp_path)
    (tmp_path / "empty.cu8").write_bytes(b"")
    with pytest.raises(CaptureError, match=r"empty.cu8: file is empty"):
        open_capture(tmp_path / "empty.cu8", rate_hz=1e6)


def test_kind_by_extension(tmp_path):
    soundfile.write(tmp_path / "a.wav", np.zeros(100), 8000)
    (tmp_path / "b.csv").write_text("Time,V\n0,1\n1,2\n")
    np.zeros(8, dtype=np.uint8).tofile(tmp_path / "c.cu8")
    np.save(tmp_path / "d.npy", np.zeros(4))
    kinds = {name: open_capture(tmp_path / name, **opts).kind for name, opts in (
        ("a.wav", {}), ("b.csv", {}), ("c.cu8", {"rate_hz": 1e6}), ("d.npy", {"rate_hz": 1.0}))}
    assert kinds == {"a.wav": "audio", "b.csv": "trace", "c.cu8": "iq", "d.npy": "npy"}


def test_kind_by_content_when_the_name_says_nothing(tmp_path):
    soundfile.write(tmp_path / "a.rec", np.zeros(100), 8000, format="WAV")
    (tmp_path / "b.dat").write_text("Time,V\n0,1\n1,2\n")
    np.save(tmp_path / "c.npy", np.zeros(4))
    (tmp_path / "c.npy").rename(tmp_path / "c.arr")
    np.arange(8, dtype=np.uint8).tofile(tmp_path / "d.dat")
    assert open_capture(tmp_path / "a.rec").kind == "audio"
    assert open_capture(tmp_path / "b.dat").kind == "trace"
    assert open_capture(tmp_path / "c.arr", rate_hz=1.0).kind == "npy"
    with pytest.raises(CaptureError, match=r"d.dat: raw samples of unknown format .*--iq-format"):
        open_capture(tmp_path / "d.dat", rate_hz=1e6)
    assert open_capture(tmp_path / "d.dat", rate_hz=1e6, iq_format="cu8").n_samples == 4


def test_options_that_do_not_apply(tmp_path):
    soundfile.write(tmp_path / "a.wav", np.zeros(100), 8000)
    np.save(tmp_path / "d.npy", np.zeros(4))
    with pytest.raises(ParameterError, match=r"a.wav: columns does not apply to audio files"):
        open_capture(tmp_path / "a.wav", columns="CH1")
    with pytest.raises(ParameterError, match=r"a.wav: iq_format does not apply to audio"):
        open_capture(tmp_path / "a.wav", iq_format="cu8")
    with pytest.raises(ParameterError, match=r"d.npy: iq_format does not apply to .npy"):
        open_capture(tmp_path / "d.npy", iq_format="cf32_le", rate_hz=1.0)


def test_rate_and_centre_given_for_audio_are_used_and_said(tmp_path):
    soundfile.write(tmp_path / "a.wav", np.zeros(100), 8000)
    cap = open_capture(tmp_path / "a.wav", rate_hz=8012.0, center_hz=7.0e6)
    assert cap.rate_hz == 8012.0 and cap.center_hz == 7.0e6
    assert any("8012 Hz as given" in n and "8000 Hz" in n for n in cap.notes)


def test_absurd_options(tmp_path):
    np.zeros(8, dtype=np.uint8).tofile(tmp_path / "c.cu8")
    with pytest.raises(ParameterError, match=r"c.cu8: sample rate -5"):
        open_capture(tmp_path / "c.cu8", rate_hz=-5)
    with pytest.raises(ParameterError, match=r"c.cu8: centre frequency 'x'"):
        open_capture(tmp_path / "c.cu8", rate_hz=1e6, center_hz="x")


def test_str_and_path_open_the_same(tmp_path, rng):
    z = (rng.normal(size=64) + 1j * rng.normal(size=64)).astype(np.complex64) / 4
    z.tofile(tmp_path / "z.cf32")
    by_str = open_capture(str(tmp_path / "z.cf32"), rate_hz=1e5)
    by_path = open_capture(tmp_path / "z.cf32", rate_hz=1e5)
    assert by_str.source == str(tmp_path / "z.cf32")
    np.testing.assert_array_equal(np.concatenate(list(by_str.blocks())),
                                  np.concatenate(list(by_path.blocks())))
