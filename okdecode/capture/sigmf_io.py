"""SigMF recordings: a ``.sigmf-meta``/``.sigmf-data`` pair or a ``.sigmf`` archive.

The metadata says everything a raw file cannot: the datatype (``core:datatype``), the rate
(``core:sample_rate``), the channels (``core:num_channels``) and, per capture segment, the
tuning (``core:frequency``, here the capture's ``center_hz``) and any header bytes before
its samples. The reference library ``sigmf`` checks the metadata against the standard's
schema and finds the dataset beside it; the samples themselves go through the memory-mapped
block reader of :mod:`okdecode.capture.iq`, so a file of any size reads in bounded memory.
An archive is a tar file: an uncompressed one is memory-mapped in place, a compressed one
is streamed through its decompressor once per pass.

:func:`write_annotations` writes a copy of the metadata with one annotation per decoded
character; it never writes to the recording's own files.

The dataset checksum (``core:sha512``) is not verified: that would read the whole file once
more before decoding it.

References
----------
.. [1] The GNU Radio Foundation, "Signal Metadata Format (SigMF) specification", v1.2
   (global, captures and annotations objects; Non-Conforming Datasets; archives).
"""

from __future__ import annotations

import copy
import io
import json
import math
import os
import tarfile
import warnings
from collections.abc import Callable, Iterable, Iterator
from os import PathLike
from pathlib import Path

import numpy as np

from ..errors import CaptureError, ParameterError
from . import Capture, check_finite, check_rate
from .iq import FORMAT_NAMES, SampleFormat, block_reader, sample_format

META_EXT, DATA_EXT, ARCHIVE_EXT = ".sigmf-meta", ".sigmf-data", ".sigmf"


def _library(source: str):
    """The reference library, imported here so that ``import okdecode`` stays fast."""
    try:
        import sigmf
        import sigmf.schema
        import sigmf.sigmffile
        import sigmf.validate
    except ImportError as err:  # pragma: no cover - the library is installed with okdecode
        raise CaptureError(source, "reading SigMF needs the sigmf package",
                           expected="pip install sigmf") from err
    return sigmf


def read_sigmf(path: Path, *, source: str, iq_format: str | None = None,
               rate_hz: float | None = None) -> Capture:
    """Open a SigMF recording for block reading.

    Parameters
    ----------
    path : Path
        The ``.sigmf-meta`` or ``.sigmf-data`` file of a pair, or a ``.sigmf`` archive
        (also ``.sigmf.gz``, ``.sigmf.xz``, ``.sigmf.bz2``).
    source : str
        Name used in messages.
    iq_format : str, optional
        Must agree with ``core:datatype`` if given.
    rate_hz : float, optional
        Used only when the metadata has no ``core:sample_rate``.

    Returns
    -------
    Capture
        ``kind="sigmf"``, ``center_hz`` from the first capture's ``core:frequency`` (0 if
        absent), ``metadata={"sigmf": <the metadata as read>, "path": <file>, ...}``.

    Raises
    ------
    CaptureError
        If the metadata is not valid SigMF, names an unknown datatype or a dataset that is
        missing, the dataset's size does not fit the datatype, or there is no rate.
    """
    name = path.name.lower()
    if name.endswith((ARCHIVE_EXT, ".sigmf.gz", ".sigmf.xz", ".sigmf.bz2")):
        meta, data = _open_archive(path, source)
    else:
        meta, data = _open_pair(path, source)
    glob = meta["global"]
    fmt = _datatype(glob, source)
    if iq_format is not None:
        given = sample_format(iq_format)
        if given is None or given.name != fmt.name:
            raise ParameterError(source, f"iq_format {iq_format!r} disagrees with the "
                                 f"metadata's core:datatype {fmt.name!r}",
                                 expected="no iq_format for SigMF recordings")
    n_channels = glob.get("core:num_channels", 1)
    rate = glob.get("core:sample_rate")
    if rate is None:
        if rate_hz is None:
            raise CaptureError(source, "the SigMF metadata has no core:sample_rate; pass "
                               "--rate HZ")
        rate = rate_hz
    rate = _metadata_rate(rate, source) if rate_hz is None else check_rate(rate, source)
    captures = sorted(meta.get("captures", []), key=lambda c: c.get("core:sample_start", 0))
    data_path, data_offset, data_size, stream = data
    segments = _segments(captures, glob, fmt, n_channels, data_size, source)
    segments = [(data_offset + off, n) for off, n in segments]
    n_samples = sum(n for _, n in segments)
    if n_samples == 0:
        raise CaptureError(source, "the SigMF dataset holds no samples",
                           expected="a non-empty recording")
    notes = [f"SigMF {fmt.name}, {rate:g} Hz, {n_channels} channel(s)"]
    if stream is None:
        reader = block_reader(data_path, fmt, segments, n_channels=n_channels, source=source)
    else:
        reader = _stream_reader(data_path, stream, fmt, segments, n_channels=n_channels,
                                source=source)
        notes.append("compressed archive: decompressed on each pass")
    freqs = [c["core:frequency"] for c in captures if "core:frequency" in c]
    center = float(freqs[0]) if freqs else 0.0
    if freqs:
        notes.append(f"tuned to {center:g} Hz (core:frequency)")
    if len(set(freqs)) > 1:
        notes.append(f"the captures are tuned to {len(set(freqs))} frequencies; frequencies "
                     f"refer to the first, {center:g} Hz")
    if not math.isfinite(center):
        raise CaptureError(source, f"core:frequency {center!r}", expected="a finite frequency")
    metadata = {"sigmf": meta, "path": str(path), "format": fmt.name,
                "data_path": str(data_path)}
    return Capture(source=source, rate_hz=rate, n_samples=n_samples, n_channels=n_channels,
                   is_complex=fmt.is_complex, kind="sigmf", reader=reader, center_hz=center,
                   channel_names=tuple(str(i) for i in range(n_channels)), notes=tuple(notes),
                   metadata=metadata)


def _metadata_rate(rate: object, source: str) -> float:
    if isinstance(rate, bool) or not isinstance(rate, (int, float)) or not (
            math.isfinite(rate) and 0 < rate <= 1e11):
        raise CaptureError(source, f"core:sample_rate is {rate!r}",
                           expected="a finite rate > 0, Hz")
    return float(rate)


def _datatype(glob: dict, source: str) -> SampleFormat:
    name = glob.get("core:datatype")
    fmt = sample_format(name) if isinstance(name, str) else None
    if fmt is None:
        raise CaptureError(source, f"unknown SigMF datatype {name!r}",
                           expected="one of " + ", ".join(FORMAT_NAMES))
    return fmt


def _load_meta(text: bytes, source: str) -> dict:
    """Parse and check metadata: JSON, a known datatype, then the standard's schema."""
    try:
        meta = json.loads(text)
    except (UnicodeDecodeError, json.JSONDecodeError) as err:
        where = f" at line {err.lineno}" if isinstance(err, json.JSONDecodeError) else ""
        raise CaptureError(source, f"SigMF metadata is not JSON{where}",
                           expected="a .sigmf-meta JSON file") from err
    if not isinstance(meta, dict) or not isinstance(meta.get("global"), dict):
        raise CaptureError(source, "SigMF metadata has no \"global\" object",
                           expected="SigMF metadata")
    _datatype(meta["global"], source)  # a clearer message than the schema's pattern
    sigmf = _library(source)
    import jsonschema

    try:
        with warnings.catch_warnings():  # undeclared extension namespaces: not our concern
            warnings.simplefilter("ignore", DeprecationWarning)
            sigmf.validate.validate(meta, sigmf.schema.get_schema())
    except jsonschema.exceptions.ValidationError as err:
        where = "/".join(str(p) for p in err.absolute_path) or "the top level"
        raise CaptureError(source, f"SigMF metadata does not follow the schema at {where}: "
                           f"{err.message}", expected="metadata valid for SigMF v1") from err
    if meta["global"].get("core:metadata_only"):
        raise CaptureError(source, "the SigMF metadata is metadata only "
                           "(core:metadata_only)", expected="a recording with its dataset")
    return meta


def _open_pair(path: Path, source: str):
    sigmf = _library(source)
    names = sigmf.sigmffile.get_sigmf_filenames(path)
    meta_path = Path(names["meta_fn"])
    if not meta_path.is_file():
        raise CaptureError(source, f"its metadata {meta_path.name} is missing",
                           expected="a .sigmf-meta file beside the .sigmf-data")
    try:
        meta = _load_meta(meta_path.read_bytes(), source)
    except OSError as err:
        raise CaptureError(source, f"cannot read {meta_path.name} ({err.strerror})") from err
    try:
        data_path = sigmf.sigmffile.get_dataset_filename_from_metadata(meta_path, meta)
    except sigmf.error.SigMFFileError as err:
        raise CaptureError(source, f"the dataset {meta['global'].get('core:dataset')!r} named "
                           "by core:dataset is missing", expected="the dataset beside the "
                           "metadata") from err
    if data_path is None:
        raise CaptureError(source, f"the dataset {Path(names['data_fn']).name} is missing",
                           expected="a .sigmf-data file beside the .sigmf-meta")
    data_path = Path(data_path)
    return meta, (data_path, 0, data_path.stat().st_size, None)


def _open_archive(path: Path, source: str):
    try:
        with tarfile.open(path, "r:*") as tar:
            return _read_archive(path, tar, source)
    except (tarfile.TarError, EOFError) as err:
        raise CaptureError(source, f"not a readable SigMF archive ({err})",
                           expected="a .sigmf tar archive") from err


def _read_archive(path: Path, tar: tarfile.TarFile, source: str):
    """The metadata of an archive and where its dataset lies."""
    members = [m for m in tar.getmembers() if m.isfile()]
    metas = [m for m in members if m.name.endswith(META_EXT)]
    if not metas:
        raise CaptureError(source, "the archive holds no .sigmf-meta file",
                           expected="a SigMF archive")
    if len(metas) > 1:
        raise CaptureError(source, f"the archive holds {len(metas)} recordings",
                           expected="one recording per archive")
    f = tar.extractfile(metas[0])
    assert f is not None
    meta = _load_meta(f.read(), source)
    stem = metas[0].name[: -len(META_EXT)]
    wanted = [stem + DATA_EXT]
    if meta["global"].get("core:dataset"):
        wanted.append(os.path.join(os.path.dirname(stem), meta["global"]["core:dataset"]))
    data = next((m for w in wanted for m in members if m.name == w), None)
    if data is None:
        raise CaptureError(source, f"the archive holds no dataset {Path(wanted[0]).name}",
                           expected="its .sigmf-data beside the .sigmf-meta")
    if _is_plain_tar(path):
        return meta, (path, data.offset_data, data.size, None)
    return meta, (path, 0, data.size, data.name)


def _is_plain_tar(path: Path) -> bool:
    """Whether a tar file is uncompressed, so that its members can be memory-mapped."""
    with open(path, "rb") as f:
        block = f.read(512)
    return len(block) == 512 and block[257:262] == b"ustar"


def _segments(captures: list, glob: dict, fmt: SampleFormat, n_channels: int, size: int,
              source: str) -> list[tuple[int, int]]:
    """``(byte_offset, n_samples)`` of each stretch of samples in the dataset.

    Each capture segment may begin with ``core:header_bytes`` that are not samples; the
    dataset may end with ``core:trailing_bytes`` [1]_.
    """
    frame = fmt.sample_bytes * n_channels
    end = size - int(glob.get("core:trailing_bytes", 0))
    starts = [int(c.get("core:sample_start", 0)) for c in captures] or [0]
    headers = [int(c.get("core:header_bytes", 0)) for c in captures] or [0]
    out: list[tuple[int, int]] = []
    offset = 0
    for i, (start, header) in enumerate(zip(starts, headers, strict=True)):
        offset += header
        if i + 1 < len(starts):
            n = starts[i + 1] - start
        else:
            n, extra = divmod(end - offset, frame)
            if extra or n < 0:
                besides = ", besides header and trailing bytes" if offset or end != size else ""
                raise CaptureError(source, f"the dataset's {size} bytes are not a whole number "
                                   f"of {fmt.name} samples ({frame} bytes each{besides})",
                                   expected="a dataset that fits core:datatype")
        if offset + n * frame > end:
            raise CaptureError(source, f"capture {i} runs past the end of the dataset",
                               expected="a complete dataset")
        if n:
            out.append((offset, n))
        offset += n * frame
    return out


def _stream_reader(archive: Path, member: str, fmt: SampleFormat,
                   segments: list[tuple[int, int]], *, n_channels: int, source: str
                   ) -> Callable[[int], Iterator[np.ndarray]]:
    """Blocks from a dataset inside a compressed archive, decompressed once per pass.

    ``segments`` are byte offsets within the dataset member.
    """
    frame = fmt.sample_bytes * n_channels
    check = fmt.component.kind == "f"

    def reader(block_len: int) -> Iterator[np.ndarray]:
        index = 0
        try:
            with tarfile.open(archive, "r:*") as tar:
                f = tar.extractfile(member)
                assert f is not None
                pos = 0
                for offset, n_samples in segments:
                    f.seek(offset - pos, io.SEEK_CUR)  # forward only: header bytes
                    pos = offset
                    for start in range(0, n_samples, block_len):
                        count = min(block_len, n_samples - start)
                        raw = f.read(count * frame)
                        pos += len(raw)
                        if len(raw) < count * frame:
                            raise CaptureError(source, f"the archive ends after {index} samples",
                                               expected="a complete archive")
                        block = fmt.convert(np.frombuffer(raw, dtype=fmt.component))
                        block = block.reshape(count, n_channels)
                        if check:
                            check_finite(block, source, index)
                        index += count
                        yield block
        except (tarfile.TarError, OSError, EOFError) as err:
            raise CaptureError(source, f"read failed after {index} samples ({err})",
                               expected="a complete archive") from err

    return reader


# ---------------------------------------------------------------------------------------
# Writing annotations


def write_annotations(recording: Capture | str | PathLike, out_path: str | PathLike,
                      characters: Iterable, *, rate_hz: float | None = None,
                      carrier_hz: float | None = None, bandwidth_hz: float | None = None,
                      iq_format: str | None = None, center_hz: float | None = None) -> Path:
    """Write a copy of a recording's SigMF metadata with one annotation per character.

    Parameters
    ----------
    recording : Capture, str or PathLike
        A SigMF recording (its capture, or the path of its ``.sigmf-meta``, ``.sigmf-data``
        or ``.sigmf``), or a raw I/Q file (its capture, or its path with ``iq_format`` and
        ``rate_hz``): then new metadata is made, naming the raw file as its dataset
        (``core:dataset``, a Non-Conforming Dataset [1]_).
    out_path : str or PathLike
        The metadata to write, a name ending in ``.sigmf-meta``; never one of the
        recording's own files.
    characters : iterable
        Decoded characters: objects with ``char``, ``start_s`` and ``end_s`` (as in
        ``Reception.characters``) or dicts with those keys (as in its JSON).
    rate_hz : float, optional
        Sample rate that turns times into sample indices, Hz; default: the recording's.
    carrier_hz : float, optional
        Absolute carrier frequency, Hz. With ``bandwidth_hz``, each annotation gets
        ``core:freq_lower_edge`` and ``core:freq_upper_edge`` at ``carrier_hz -/+
        bandwidth_hz / 2``.
    bandwidth_hz : float, optional
        Width of the band the characters were received in, Hz.
    iq_format, center_hz : optional
        Reader options for a raw I/Q path, as for :func:`okdecode.capture.open_capture`.

    Returns
    -------
    Path
        ``out_path``.

    Raises
    ------
    ParameterError
        If ``out_path`` is one of the recording's files or not a ``.sigmf-meta`` name, the
        recording has no SigMF description, or an option is absurd.
    CaptureError
        If the recording cannot be read.

    Notes
    -----
    Each annotation spans the character from the start of its first mark to the end of
    its last: ``core:sample_start = core:offset + round(start_s * rate_hz)`` and
    ``core:sample_count = round(end_s * rate_hz) - round(start_s * rate_hz)`` (at least 1,
    and within the recording),
    with ``core:label`` the character (procedural signals as ``<AR>``), and
    ``core:generator`` "okdecode". The recording's own annotations are kept; all are
    sorted by ``core:sample_start``, as the standard asks [1]_.
    """
    if isinstance(recording, Capture):
        cap = recording
    else:
        from . import open_capture

        cap = open_capture(recording, rate_hz=rate_hz, iq_format=iq_format, center_hz=center_hz)
    out = Path(out_path)
    source = str(out_path)
    if not out.name.lower().endswith(META_EXT):
        raise ParameterError(source, "an annotation file must be named *.sigmf-meta",
                             expected="a name ending in .sigmf-meta")
    meta = cap.metadata.get("sigmf")
    if meta is None:
        raise ParameterError(cap.source, f"{cap.kind} recordings have no SigMF description "
                             "to annotate", expected="a SigMF or raw I/Q recording")
    inputs = [cap.metadata.get("path"), cap.metadata.get("data_path")]
    if cap.kind == "sigmf" and str(cap.metadata["path"]).lower().endswith((META_EXT, DATA_EXT)):
        sigmf = _library(source)
        inputs.append(sigmf.sigmffile.get_sigmf_filenames(cap.metadata["path"])["meta_fn"])
    if out.exists() and any(p is not None and Path(p).exists() and out.samefile(p)
                            for p in inputs):
        raise ParameterError(source, "is the recording's own file; annotations go to a copy",
                             expected="another .sigmf-meta name")
    rate = check_rate(rate_hz if rate_hz is not None else cap.rate_hz, source)
    edges = None
    if carrier_hz is not None and bandwidth_hz is not None:
        lo, hi = float(carrier_hz) - float(bandwidth_hz) / 2, float(carrier_hz) + float(
            bandwidth_hz) / 2
        if not (math.isfinite(lo) and math.isfinite(hi) and bandwidth_hz > 0):
            raise ParameterError(source, f"carrier {carrier_hz!r} Hz, bandwidth "
                                 f"{bandwidth_hz!r} Hz", expected="finite, bandwidth > 0")
        edges = (lo, hi)
    meta = copy.deepcopy(meta)
    if cap.kind == "iq" and center_hz is None and cap.center_hz:
        meta["captures"][0]["core:frequency"] = cap.center_hz
    glob = meta["global"]
    glob.setdefault("core:version", _library(source).__specification__)
    first = int(glob.get("core:offset", 0))
    notes = list(meta.get("annotations", []))
    for c in characters:
        char, start_s, end_s = (c["char"], c["start_s"], c["end_s"]) if isinstance(c, dict) \
            else (c.char, c.start_s, c.end_s)
        start = min(max(int(round(float(start_s) * rate)), 0), cap.n_samples - 1)
        stop = min(max(int(round(float(end_s) * rate)), start + 1), cap.n_samples)
        note = {"core:sample_start": first + start, "core:sample_count": stop - start,
                "core:label": str(char), "core:generator": "okdecode"}
        if edges is not None:
            note["core:freq_lower_edge"], note["core:freq_upper_edge"] = edges
        notes.append(note)
    meta["annotations"] = sorted(notes, key=lambda a: a.get("core:sample_start", 0))
    text = json.dumps(meta, indent=2) + "\n"
    tmp = out.with_name(out.name + ".part")
    try:
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, out)
    except OSError as err:
        tmp.unlink(missing_ok=True)
        raise ParameterError(source, f"cannot be written ({err.strerror})") from err
    return out

