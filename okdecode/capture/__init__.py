"""Stage 0: a file (or an array) to a :class:`Capture` that yields sample blocks.

A capture never holds the whole recording unless it came as an array: it knows its
rate, length and channels, and :meth:`Capture.blocks` reads it again from the start
each time it is called, block by block, so later stages may make more than one pass
with memory bounded by the block length.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from os import PathLike
from pathlib import Path

import numpy as np

from ..errors import CaptureError, ParameterError

#: Samples per block handed to the next stage (per channel).
BLOCK_LEN = 1 << 18


@dataclass(frozen=True)
class Capture:
    """A recording: its rate, shape and a way to read it block by block.

    ``blocks()`` yields arrays of shape ``(n, n_channels)``, float32 or float64 for real
    recordings and complex64 or complex128 for I/Q, at full scale 1.0 where the format
    has one, with finite values (a reader raises :class:`CaptureError` on NaN or infinity
    when it meets them).
    """

    source: str  # the file name as given, or "<array>", for messages
    rate_hz: float  # samples per second per channel
    n_samples: int  # per channel
    n_channels: int
    is_complex: bool  # complex baseband (I/Q) rather than real samples
    kind: str  # "audio", "iq", "sigmf", "trace", "npy" or "array"
    reader: Callable[[int], Iterator[np.ndarray]] = field(repr=False)
    center_hz: float = 0.0  # frequency of baseband 0 Hz (I/Q) or of 0 Hz (real), Hz
    channel_names: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()  # what the reader inferred, said in the summary
    metadata: dict = field(default_factory=dict, repr=False)  # e.g. SigMF global fields

    @property
    def duration_s(self) -> float:
        """Length of the recording, s."""
        return self.n_samples / self.rate_hz

    def blocks(self, block_len: int = BLOCK_LEN) -> Iterator[np.ndarray]:
        """Yield ``(n, n_channels)`` blocks from the start; n <= block_len, never 0."""
        for block in self.reader(block_len):
            if block.size:
                yield block


def check_finite(block: np.ndarray, source: str, offset: int) -> None:
    """Raise CaptureError naming the first sample that is NaN or infinite."""
    bad = ~np.isfinite(block)
    if bad.any():
        index = offset + int(np.flatnonzero(bad.any(axis=-1) if bad.ndim > 1 else bad)[0])
        raise CaptureError(source, f"sample {index} is not finite", expected="finite samples")


def read_failure(source: str, index: int, err: Exception) -> CaptureError:
    """The CaptureError for a read that failed part way (an OSError or ValueError)."""
    return CaptureError(source, f"read failed after {index} samples ({err})",
                        expected="a file that does not change while it is read")


def from_array(
    samples: np.ndarray, rate_hz: float, *, center_hz: float = 0.0, source: str = "<array>"
) -> Capture:
    """Wrap samples held in memory as a capture.

    Parameters
    ----------
    samples : ndarray, shape (n,) or (n, n_channels), real or complex
        The recording; complex means I/Q baseband.
    rate_hz : float
        Sample rate, Hz, finite and > 0.
    center_hz : float
        Frequency that baseband 0 Hz stands for, Hz (I/Q only).

    Raises
    ------
    ParameterError
        For a rate that is not a positive finite number.
    CaptureError
        For an empty, non-numeric, non-finite or badly shaped array.
    """
    check_rate(rate_hz, source)
    x = np.asarray(samples)
    if x.dtype.kind not in "iufc" or x.dtype == bool:
        raise CaptureError(source, f"array of {x.dtype}", expected="numbers")
    if x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2 or x.shape[0] == 0 or x.shape[1] == 0:
        raise CaptureError(source, f"array of shape {np.shape(samples)}", expected="(n,) or "
                           "(n, channels) with n > 0")
    is_complex = x.dtype.kind == "c"
    x = x.astype(np.complex128 if is_complex else np.float64, copy=False)
    check_finite(x, source, 0)

    def reader(block_len: int) -> Iterator[np.ndarray]:
        for start in range(0, x.shape[0], block_len):
            yield x[start : start + block_len]

    return Capture(source=source, rate_hz=float(rate_hz), n_samples=x.shape[0],
                   n_channels=x.shape[1], is_complex=is_complex, kind="array", reader=reader,
                   center_hz=float(center_hz))


def check_rate(rate_hz: object, source: str) -> float:
    """A sample rate as float, or ParameterError."""
    try:
        rate = float(rate_hz)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        rate = float("nan")
    if not np.isfinite(rate) or rate <= 0 or rate > 1e11:
        raise ParameterError(source, f"sample rate {rate_hz!r} Hz", expected="a finite rate > 0")
    return rate


def looks_like_text(head: bytes) -> bool:
    """Whether the first bytes of a file are text: no NUL, UTF-8 (or 8-bit) printable.

    Examples
    --------
    >>> looks_like_text(b"time,ch1\\n0,0.5\\n"), looks_like_text(b"RIFF\\x24\\x00\\x00\\x00WAVE")
    (True, False)
    """
    if not head or b"\x00" in head:
        return False
    try:
        text = head.decode("utf-8")
    except UnicodeDecodeError as err:
        if err.start < len(head) - 4:  # not just a character cut at the end of the head
            text = head.decode("latin-1")
        else:
            text = head[: err.start].decode("utf-8")
    printable = sum(ch.isprintable() or ch in "\t\r\n" for ch in text)
    return printable >= 0.95 * max(len(text), 1)



#: Extensions read through soundfile.
AUDIO_EXTENSIONS = (".wav", ".wave", ".flac", ".ogg", ".oga", ".opus", ".aif", ".aiff", ".aifc",
                    ".au", ".snd", ".w64", ".rf64", ".caf", ".mp3")
#: Extensions of text traces (oscilloscope and logger exports).
TRACE_EXTENSIONS = (".csv", ".tsv", ".txt", ".asc", ".prn")
#: SigMF recordings: a metadata and dataset pair, or an archive (compressed or not).
SIGMF_SUFFIXES = (".sigmf-meta", ".sigmf-data", ".sigmf", ".sigmf.gz", ".sigmf.xz",
                  ".sigmf.bz2")
#: Leading bytes of formats told by their content when the name says nothing.
_AUDIO_MAGIC = (b"RIFF", b"RIFX", b"RF64", b"BW64", b"fLaC", b"OggS", b"FORM", b".snd",
                b"ID3")
_NPY_MAGIC = b"\x93NUMPY"


def open_capture(path: str | PathLike, *, rate_hz: float | None = None,
                 iq_format: str | None = None, center_hz: float | None = None,
                 columns: object = None) -> Capture:
    """Open a recording of any supported kind, chosen by its name and content.

    The kind comes from the name: SigMF (``.sigmf-meta``, ``.sigmf-data``, ``.sigmf``),
    NumPy (``.npy``), raw samples (``.cu8``, ``.cs8``, ``.cs16``, ``.cf32``, ``.cfile``, ...,
    or any name with ``iq_format``), audio (``.wav``, ``.flac``, ``.ogg``, ...) and traces
    (``.csv``, ``.tsv``, ``.txt``, ...). Other names are told by their content: an audio
    container or NumPy header by its leading bytes, text as a trace, anything else as raw
    samples (which then need ``iq_format``).

    Parameters
    ----------
    path : str or PathLike
        The file.
    rate_hz : float, optional
        Sample rate, Hz. Needed for raw samples and ``.npy``, and for traces without a time
        column or sample-interval line; for other kinds it replaces the rate the file
        states (said in a note).
    iq_format : str, optional
        SigMF datatype of raw samples (``cu8``, ``ci8``, ``ci16_le``, ``cf32_le``, ...).
    center_hz : float, optional
        Frequency of 0 Hz in the samples (the tuning of an I/Q receiver, or the dial of an
        audio one), Hz, so that reported frequencies are absolute. For SigMF it replaces
        the captures' ``core:frequency``.
    columns : int, str or sequence of them, optional
        Traces only: the columns to read as channels, by header name or by index among the
        signal columns (the time column not counted); default: every signal column.

    Returns
    -------
    Capture

    Raises
    ------
    CaptureError
        If the file is missing, empty, not a recording okdecode reads, or lacks what its
        kind needs (a rate, a format).
    ParameterError
        If an option is absurd or does not apply to the file's kind.
    """
    p = Path(path)
    source = str(path)
    if not p.exists():
        raise CaptureError(source, "no such file")
    if p.is_dir():
        raise CaptureError(source, "is a folder", expected="a recording file")
    try:
        size = p.stat().st_size
        with open(p, "rb") as f:
            head = f.read(4096)
    except OSError as err:
        raise CaptureError(source, f"cannot be read ({err.strerror or err})") from err
    if size == 0:
        raise CaptureError(source, "file is empty", expected="a recording")
    if center_hz is not None:
        from .iq import check_center

        center_hz = check_center(center_hz, source)
    if rate_hz is not None:
        rate_hz = check_rate(rate_hz, source)
    kind = _kind(p, head, iq_format)

    def refuse(option: str, value: object) -> None:
        if value is not None:
            raise ParameterError(source, f"{option} does not apply to {_KIND_WORDS[kind]}")

    if kind != "trace":
        refuse("columns", columns)
    if kind not in ("iq", "sigmf"):
        refuse("iq_format", iq_format)
    if kind == "audio":
        from . import audio

        cap = audio.read_audio(p, source=source)
    elif kind == "iq":
        from . import iq

        return iq.read_iq(p, source=source, iq_format=iq_format, rate_hz=rate_hz,
                          center_hz=center_hz)
    elif kind == "sigmf":
        from . import sigmf_io

        cap = sigmf_io.read_sigmf(p, source=source, iq_format=iq_format, rate_hz=rate_hz)
    elif kind == "npy":
        from . import npy

        return npy.read_npy(p, source=source, rate_hz=rate_hz, center_hz=center_hz)
    else:
        from . import trace

        cap = trace.read_trace(p, source=source, rate_hz=rate_hz, columns=columns)
        rate_hz = None  # the trace reader took it
    return _override(cap, rate_hz=rate_hz, center_hz=center_hz)


_KIND_WORDS = {"audio": "audio files", "iq": "raw I/Q files", "sigmf": "SigMF recordings",
               "npy": ".npy arrays", "trace": "traces"}


def _kind(p: Path, head: bytes, iq_format: str | None) -> str:
    """Which reader a file goes to, from its name and its first bytes."""
    name = p.name.lower()
    suffix = p.suffix.lower()
    if name.endswith(SIGMF_SUFFIXES):
        return "sigmf"
    if suffix == ".npz":
        raise CaptureError(str(p), "is a NumPy .npz archive", expected="one array saved "
                           "with numpy.save as .npy")
    if suffix == ".npy" or head.startswith(_NPY_MAGIC):
        return "npy"
    if iq_format is not None and suffix not in AUDIO_EXTENSIONS + TRACE_EXTENSIONS:
        return "iq"
    from .iq import EXTENSIONS, sample_format

    if suffix in EXTENSIONS or (suffix and sample_format(suffix[1:]) is not None):
        return "iq"
    if suffix in AUDIO_EXTENSIONS:
        return "audio"
    if suffix in TRACE_EXTENSIONS:
        return "trace"
    if head.startswith(_AUDIO_MAGIC):
        return "audio"
    if looks_like_text(head):
        return "trace"
    return "iq"


def _override(cap: Capture, *, rate_hz: float | None, center_hz: float | None) -> Capture:
    """The capture with a rate or centre frequency given by the user, said in a note."""
    from dataclasses import replace

    notes = list(cap.notes)
    changes: dict = {}
    if rate_hz is not None and rate_hz != cap.rate_hz:
        notes.append(f"sample rate {rate_hz:g} Hz as given (the file says {cap.rate_hz:g} Hz)")
        changes["rate_hz"] = rate_hz
    if center_hz is not None and center_hz != cap.center_hz:
        if cap.center_hz:
            notes.append(f"centre frequency {center_hz:g} Hz as given (the file says "
                         f"{cap.center_hz:g} Hz)")
        changes["center_hz"] = center_hz
    if not changes:
        return cap
    return replace(cap, notes=tuple(notes), **changes)
