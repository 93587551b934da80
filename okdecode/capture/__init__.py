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

    ``blocks()`` yields arrays of shape ``(n, n_channels)``, float64 for real
    recordings and complex128 for I/Q, with finite values (a reader raises
    :class:`CaptureError` on NaN or infinity when it meets them).
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


def open_capture(path: str | PathLike, **options) -> Capture:
    """Open a recording of any supported kind, chosen by its name and content.

    Parameters
    ----------
    path : str or PathLike
        The file.
    **options
        Reader options (``rate_hz``, ``iq_format``, ``center_hz``, ...), for kinds that
        need them.

    Raises
    ------
    CaptureError
        If the file is missing, empty or not a recording okdecode reads.
    """
    p = Path(path)
    source = str(path)
    if not p.exists():
        raise CaptureError(source, "no such file")
    if p.is_dir():
        raise CaptureError(source, "is a folder", expected="a recording file")
    if p.stat().st_size == 0:
        raise CaptureError(source, "file is empty", expected="a recording")
    from . import audio

    return audio.read_audio(p, source=source)
