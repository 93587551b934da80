"""Audio reader: truncated WAV files, text named .wav, RIFF chunk walking, NaN samples."""

from __future__ import annotations

import struct

import numpy as np
import pytest
import soundfile

from okdecode.capture import open_capture
from okdecode.errors import CaptureError


def _wav(path, n: int = 8000, rate_hz: int = 8000, subtype: str = "PCM_16"):
    x = 0.5 * np.sin(2 * np.pi * 700.0 * np.arange(n) / rate_hz)
    soundfile.write(path, x, rate_hz, subtype=subtype)
    return x


def _riff(*chunks: tuple[bytes, bytes]) -> bytes:
    """A RIFF WAVE file from (id, payload) chunks, odd payloads padded (RIFF 1.0, ch. 3)."""
    body = b"WAVE"
    for chunk_id, payload in chunks:
        body += chunk_id + struct.pack("<I", len(payload)) + payload + b"\0" * (len(payload) & 1)
    return b"RIFF" + struct.pack("<I", len(body)) + body


_FMT = struct.pack("<HHIIHH", 1, 1, 8000, 16000, 2, 16)  # PCM, mono, 8 kHz, 16 bits


def test_truncated_wav_is_refused_at_open(tmp_path):
    # libsndfile would read the 7500 frames left as if nothing were missing
    path = tmp_path / "cut.wav"
    _wav(path)
    data = path.read_bytes()
    path.write_bytes(data[:-1000])
    with pytest.raises(CaptureError, match=rf"^{path}: truncated: the WAV data chunk declares "
                                           "16000 bytes but the file holds 15000"):
        open_capture(path)


def test_wav_cut_before_its_data_chunk(tmp_path):
    path = tmp_path / "head.wav"
    path.write_bytes(_riff((b"fmt ", _FMT))[:30])
    with pytest.raises(CaptureError, match=rf"^{path}: truncated: the file ends before"):
        open_capture(path)


def test_odd_chunk_before_data_is_walked_past(tmp_path):
    samples = (np.arange(100, dtype="<i2") * 100).tobytes()
    path = tmp_path / "list.wav"
    path.write_bytes(_riff((b"fmt ", _FMT), (b"LIST", b"XQ7ZB"), (b"data", samples)))
    cap = open_capture(path)
    got = np.concatenate(list(cap.blocks()))[:, 0]
    np.testing.assert_array_equal(got, np.arange(100) * 100 / 32768)


def test_wav_with_an_unwritten_data_length_reads_to_the_end(tmp_path):
    # a recorder stopped before it wrote the length leaves 0xFFFFFFFF (common practice)
    path = tmp_path / "open.wav"
    _wav(path)
    data = bytearray(path.read_bytes())
    at = data.find(b"data")
    data[at + 4 : at + 8] = b"\xff\xff\xff\xff"
    path.write_bytes(bytes(data))
    assert open_capture(path).n_samples == 8000


def test_text_file_named_wav(tmp_path):
    path = tmp_path / "notes.wav"
    path.write_text("Time,CH1\n0,0.5\n1e-3,0.25\n")
    with pytest.raises(CaptureError, match=rf"^{path}: is a text file, not WAV audio"):
        open_capture(path)


def test_binary_junk_named_wav(tmp_path, rng):
    path = tmp_path / "junk.wav"
    path.write_bytes(b"\0" + rng.integers(0, 256, 4000, dtype=np.uint8).tobytes())
    with pytest.raises(CaptureError, match=rf"^{path}: not a readable audio file"):
        open_capture(path)


def test_all_nan_float_wav_is_named_when_read(tmp_path):
    path = tmp_path / "nan.wav"
    soundfile.write(path, np.full(1000, np.nan), 8000, subtype="FLOAT")
    cap = open_capture(path)
    with pytest.raises(CaptureError, match=rf"^{path}: sample 0 is not finite"):
        list(cap.blocks())


def test_healthy_files_still_read(tmp_path):
    for name, subtype in (("ok.wav", "PCM_24"), ("ok.flac", "PCM_16")):
        x = _wav(tmp_path / name, subtype=subtype)
        cap = open_capture(tmp_path / name)
        assert cap.kind == "audio" and cap.n_samples == 8000 and cap.rate_hz == 8000.0
        got = np.concatenate(list(cap.blocks(1000)))[:, 0]
        np.testing.assert_allclose(got, x, atol=2.0**-15)  # 16-bit rounding at most


@pytest.mark.skipif("MP3" not in soundfile.available_formats(),
                    reason="this libsndfile has no MP3 (1.1 or later does)")
def test_mp3_is_read_as_audio(tmp_path):
    # a lossy file of a 700 Hz keyed tone: read through soundfile, decoded end to end
    from okdecode.receiver import decode_file
    from okdecode.synth import synth

    rec = synth("QZ4RB TEST", wpm=20.0, carrier_hz=700.0, rate_hz=8000.0, cn0_dbhz=36.0,
                seed=5)
    path = tmp_path / "keyed.mp3"
    soundfile.write(path, rec.samples, 8000, format="MP3")
    assert decode_file(path).text == rec.truth.text
