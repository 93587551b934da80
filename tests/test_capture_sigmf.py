"""SigMF reader and annotation writer, checked against the reference library ``sigmf``."""

from __future__ import annotations

import hashlib
import json
import tarfile
import warnings
from pathlib import Path

import numpy as np
import pytest
import sigmf
import sigmf.schema
import sigmf.validate

from okdecode.capture import open_capture
from okdecode.capture.sigmf_io import write_annotations
from okdecode.errors import CaptureError, ParameterError

CENTER_HZ = 14.060e6  # an invented tuning


def _samples(cap) -> np.ndarray:
    return np.concatenate(list(cap.blocks(100)))


def _write_pair(base: Path, data: np.ndarray, datatype: str, *, rate_hz: float | None = 48e3,
                captures: list | None = None, **glob) -> Path:
    """A recording written by the reference library: base.sigmf-meta and base.sigmf-data."""
    data.tofile(base.with_suffix(".sigmf-data"))
    info = {"core:datatype": datatype, **glob}
    if rate_hz is not None:
        info["core:sample_rate"] = rate_hz
    meta = sigmf.SigMFFile(global_info=info)
    meta.set_data_file(base.with_suffix(".sigmf-data"))
    for start, fields in captures or [(0, {"core:frequency": CENTER_HZ})]:
        meta.add_capture(start, metadata=fields)
    meta.tofile(base)
    return base.with_suffix(".sigmf-meta")


def _validate(meta: dict) -> None:
    """The reference library's check against the SigMF schema (raises if invalid)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        sigmf.validate.validate(meta, sigmf.schema.get_schema())


@pytest.mark.parametrize(("datatype", "dtype", "scale"), [
    ("cf32_le", "<c8", 1.0), ("ci16_le", "<i2", 2.0**-15), ("cu8", "u1", None),
])
def test_pair_round_trip(datatype, dtype, scale, tmp_path, rng):
    if datatype == "cf32_le":
        data = ((rng.normal(size=300) + 1j * rng.normal(size=300)) / 4).astype(dtype)
        expected = data.astype(np.complex128)
    else:
        info = np.iinfo(dtype)
        data = rng.integers(info.min, info.max, 600, endpoint=True).astype(dtype)
        comps = data.astype(np.float64)
        # SigMF fixed point: signed / 2**(bits-1); cu8 offset-binary, (b - 127.5) / 127.5
        comps = comps * scale if scale else (comps - 127.5) / 127.5
        expected = comps[0::2] + 1j * comps[1::2]
    meta_path = _write_pair(tmp_path / "pass", data, datatype)
    for path in (meta_path, meta_path.with_suffix(".sigmf-data")):
        cap = open_capture(path)
        assert cap.kind == "sigmf" and cap.is_complex and cap.rate_hz == 48e3
        assert cap.center_hz == CENTER_HZ  # core:frequency of the first capture
        np.testing.assert_allclose(_samples(cap)[:, 0], expected, rtol=0, atol=2.0**-23)


def test_archive_round_trip_plain_and_compressed(tmp_path, rng):
    data = ((rng.normal(size=500) + 1j * rng.normal(size=500)) / 4).astype(np.complex64)
    meta = sigmf.fromarray(data)
    meta.sample_rate = 250e3
    meta.add_capture(0, metadata={"core:frequency": CENTER_HZ})
    archive = tmp_path / "pass.sigmf"
    meta.tofile(archive)  # the reference library's archive: an uncompressed tar
    cap = open_capture(archive)
    assert cap.rate_hz == 250e3 and cap.center_hz == CENTER_HZ
    np.testing.assert_array_equal(_samples(cap)[:, 0], data)
    # the same archive compressed: streamed through the decompressor on each pass
    packed = tmp_path / "packed.sigmf"
    with tarfile.open(archive) as src, tarfile.open(packed, "w:gz") as dst:
        for member in src.getmembers():
            dst.addfile(member, src.extractfile(member) if member.isfile() else None)
    cap = open_capture(packed)
    assert any("compressed" in n for n in cap.notes)
    np.testing.assert_array_equal(_samples(cap)[:, 0], data)
    np.testing.assert_array_equal(_samples(cap)[:, 0], data)  # and again, from the start


def test_two_channels_interleaved(tmp_path, rng):
    data = rng.integers(-2**15, 2**15, (200, 2, 2)).astype("<i2")  # sample, channel, I/Q
    meta_path = _write_pair(tmp_path / "two", data, "ci16_le", **{"core:num_channels": 2})
    cap = open_capture(meta_path)
    assert cap.n_channels == 2 and cap.n_samples == 200
    x = data.astype(np.float64) / 2**15
    np.testing.assert_allclose(_samples(cap), x[..., 0] + 1j * x[..., 1], atol=2.0**-23)


def test_header_bytes_before_capture_segments(tmp_path, rng):
    # SigMF v1.2, core:header_bytes: a Non-Conforming Dataset of cu8 with 4 header bytes
    # before each of two segments, the second starting at sample 500
    samples = rng.integers(0, 256, (800, 2), dtype=np.uint8)
    raw = b"HDR1" + samples[:500].tobytes() + b"HDR2" + samples[500:].tobytes()
    (tmp_path / "chunks.dat").write_bytes(raw)
    meta = {"global": {"core:datatype": "cu8", "core:version": "1.2.0",
                       "core:sample_rate": 2.048e6, "core:dataset": "chunks.dat"},
            "captures": [{"core:sample_start": 0, "core:header_bytes": 4},
                         {"core:sample_start": 500, "core:header_bytes": 4}],
            "annotations": []}
    _validate(meta)
    path = tmp_path / "chunks.sigmf-meta"
    path.write_text(json.dumps(meta))
    cap = open_capture(path)
    assert cap.n_samples == 800
    x = (samples.astype(np.float64) - 127.5) / 127.5
    np.testing.assert_allclose(_samples(cap)[:, 0], x[:, 0] + 1j * x[:, 1], atol=2.0**-23)


# ---------------------------------------------------------------------------------------
# Bad input


def _meta_file(tmp_path: Path, meta: dict, name: str = "bad") -> Path:
    path = tmp_path / f"{name}.sigmf-meta"
    path.write_text(json.dumps(meta))
    return path


def _glob(**fields) -> dict:
    return {"global": {"core:datatype": "cf32_le", "core:version": "1.2.0",
                       "core:sample_rate": 1e6, **fields}, "captures": [], "annotations": []}


def test_missing_data_file(tmp_path):
    path = _meta_file(tmp_path, _glob())
    with pytest.raises(CaptureError, match=rf"^{path}: the dataset bad.sigmf-data is missing"):
        open_capture(path)


def test_missing_non_conforming_dataset(tmp_path):
    path = _meta_file(tmp_path, _glob(**{"core:dataset": "gone.iq"}))
    with pytest.raises(CaptureError, match=rf"^{path}: the dataset 'gone.iq' named by "
                                           "core:dataset is missing"):
        open_capture(path)


def test_data_file_without_its_metadata(tmp_path):
    path = tmp_path / "lone.sigmf-data"
    path.write_bytes(bytes(64))
    with pytest.raises(CaptureError, match=rf"^{path}: its metadata lone.sigmf-meta is missing"):
        open_capture(path)


@pytest.mark.parametrize("datatype", ["cf16_le", "ci12_le", "xyz", 7])
def test_unknown_datatype(datatype, tmp_path):
    meta = _glob()
    meta["global"]["core:datatype"] = datatype
    path = _meta_file(tmp_path, meta)
    (tmp_path / "bad.sigmf-data").write_bytes(bytes(64))
    with pytest.raises(CaptureError, match=rf"^{path}: unknown SigMF datatype"):
        open_capture(path)


def test_metadata_that_is_not_json(tmp_path):
    path = tmp_path / "bad.sigmf-meta"
    path.write_text('{"global": {"core:datatype": "cf32_le",\n')
    with pytest.raises(CaptureError, match=rf"^{path}: SigMF metadata is not JSON at line"):
        open_capture(path)


def test_metadata_against_the_schema(tmp_path):
    path = _meta_file(tmp_path, _glob(**{"core:sample_rate": "fast"}))
    (tmp_path / "bad.sigmf-data").write_bytes(bytes(64))
    with pytest.raises(CaptureError, match=rf"^{path}: SigMF metadata does not follow the "
                                           "schema at global/core:sample_rate"):
        open_capture(path)


def test_dataset_that_does_not_fit_the_datatype(tmp_path):
    path = _meta_file(tmp_path, _glob())
    (tmp_path / "bad.sigmf-data").write_bytes(bytes(8 * 10 + 3))
    with pytest.raises(CaptureError, match=rf"^{path}: the dataset's 83 bytes are not a whole "
                                           "number of cf32_le samples"):
        open_capture(path)


def test_no_sample_rate_says_pass_rate(tmp_path):
    meta = _glob()
    del meta["global"]["core:sample_rate"]
    path = _meta_file(tmp_path, meta)
    (tmp_path / "bad.sigmf-data").write_bytes(bytes(64))
    with pytest.raises(CaptureError, match=rf"^{path}: .*core:sample_rate; pass --rate HZ$"):
        open_capture(path)
    assert open_capture(path, rate_hz=5e5).rate_hz == 5e5


def test_iq_format_that_disagrees(tmp_path):
    path = _meta_file(tmp_path, _glob())
    (tmp_path / "bad.sigmf-data").write_bytes(bytes(64))
    with pytest.raises(ParameterError, match=rf"^{path}: iq_format 'cu8' disagrees"):
        open_capture(path, iq_format="cu8")
    assert open_capture(path, iq_format="cf32_le").n_samples == 8


def test_archive_without_metadata(tmp_path):
    path = tmp_path / "empty.sigmf"
    with tarfile.open(path, "w"):
        pass
    with pytest.raises(CaptureError, match=rf"^{path}: the archive holds no .sigmf-meta"):
        open_capture(path)


# ---------------------------------------------------------------------------------------
# Annotations


def _chars(*spans) -> list[dict]:
    return [{"char": c, "start_s": a, "end_s": b} for c, a, b in spans]


def test_annotations_are_valid_sigmf_and_leave_the_input_alone(tmp_path, rng):
    data = ((rng.normal(size=4800) + 1j * rng.normal(size=4800)) / 4).astype(np.complex64)
    meta_path = _write_pair(tmp_path / "pass", data, "cf32_le")
    before = {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in tmp_path.iterdir()}
    out = tmp_path / "notes.sigmf-meta"
    chars = _chars(("C", 0.010, 0.0405), ("<AR>", 0.05, 0.09))
    assert write_annotations(meta_path, out, chars, carrier_hz=CENTER_HZ + 700.0,
                             bandwidth_hz=50.0) == out
    meta = json.loads(out.read_text())
    _validate(meta)
    notes = meta["annotations"]
    assert [a["core:label"] for a in notes] == ["C", "<AR>"]
    # 48 kHz: 0.010 s is sample 480, 0.0405 s is sample 1944
    assert (notes[0]["core:sample_start"], notes[0]["core:sample_count"]) == (480, 1464)
    assert notes[1]["core:freq_lower_edge"] == CENTER_HZ + 675.0
    assert notes[1]["core:freq_upper_edge"] == CENTER_HZ + 725.0
    original = json.loads(meta_path.read_text())
    assert meta["global"] == original["global"] and meta["captures"] == original["captures"]
    after = {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in tmp_path.iterdir()
             if p != out}
    assert after == before


def test_annotations_never_overwrite_the_input(tmp_path, rng):
    data = np.zeros(100, dtype=np.complex64)
    meta_path = _write_pair(tmp_path / "pass", data, "cf32_le")
    text = meta_path.read_text()
    with pytest.raises(ParameterError, match="the recording's own file"):
        write_annotations(meta_path, meta_path, _chars(("E", 0.0, 0.001)))
    with pytest.raises(ParameterError, match=r"\*.sigmf-meta"):
        write_annotations(meta_path, tmp_path / "pass.sigmf-data", _chars(("E", 0.0, 0.001)))
    assert meta_path.read_text() == text


def test_existing_annotations_are_kept_in_order(tmp_path):
    data = np.zeros(1000, dtype=np.complex64)
    meta_path = _write_pair(tmp_path / "pass", data, "cf32_le", rate_hz=1000.0)
    meta = json.loads(meta_path.read_text())
    meta["annotations"] = [{"core:sample_start": 300, "core:sample_count": 10,
                            "core:label": "operator note"}]
    meta_path.write_text(json.dumps(meta))
    out = write_annotations(meta_path, tmp_path / "o.sigmf-meta",
                            _chars(("E", 0.1, 0.11), ("T", 0.5, 0.53)))
    labels = [a["core:label"] for a in json.loads(out.read_text())["annotations"]]
    assert labels == ["E", "operator note", "T"]


def test_raw_iq_gets_new_metadata_naming_it(tmp_path, rng):
    raw = tmp_path / "site3.cu8"
    codes = rng.integers(0, 256, 2000, dtype=np.uint8)
    codes.tofile(raw)
    out = write_annotations(raw, tmp_path / "site3.sigmf-meta", _chars(("K", 0.0001, 0.0002)),
                            rate_hz=1e6, center_hz=CENTER_HZ)
    meta = json.loads(out.read_text())
    _validate(meta)
    assert meta["global"]["core:dataset"] == "site3.cu8"
    assert meta["captures"][0]["core:frequency"] == CENTER_HZ
    # the reference library reads the raw file through the new metadata
    lib = sigmf.fromfile(out, skip_checksum=True, autoscale=False)
    assert lib.sample_count == 1000
    again = open_capture(out)
    assert again.n_samples == 1000 and again.center_hz == CENTER_HZ


# ---------------------------------------------------------------------------------------
# Decoding


def test_sigmf_recording_decodes_and_annotates(tmp_path):
    from okdecode.receiver import decode_file
    from okdecode.synth import synth

    rec = synth("XQ7ZB DE", wpm=25, carrier_hz=-4000.0, rate_hz=48000.0, cn0_dbhz=40.0,
                iq=True, seed=21)
    comps = np.empty(2 * rec.samples.size)
    comps[0::2], comps[1::2] = rec.samples.real, rec.samples.imag
    meta_path = _write_pair(tmp_path / "pass", np.round(comps * 2**15).astype("<i2"), "ci16_le")
    result = decode_file(meta_path)  # no options: the metadata says everything
    assert result.text == rec.truth.text
    assert abs(result.carrier_hz - (CENTER_HZ - 4000.0)) < 5.0
    out = write_annotations(meta_path, tmp_path / "decoded.sigmf-meta", result.characters,
                            carrier_hz=result.carrier_hz, bandwidth_hz=50.0)
    meta = json.loads(out.read_text())
    _validate(meta)
    labels = "".join(a["core:label"] for a in meta["annotations"])
    assert labels == rec.truth.text.replace(" ", "")
    # each annotation lies within the character's true span, to a dot (0.048 s at 25 WPM)
    for note, start_s, end_s in zip(meta["annotations"], rec.truth.keying.char_start_s,
                                    rec.truth.keying.char_end_s, strict=True):
        assert abs(note["core:sample_start"] / 48000.0 - start_s) < 0.048
        assert abs((note["core:sample_start"] + note["core:sample_count"]) / 48000.0
                   - end_s) < 0.048
