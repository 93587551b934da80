"""Raw sample files: interleaved I/Q (or real samples) named by SigMF datatypes.

A raw file is nothing but samples, so its format and rate come from the user (``iq_format``,
``rate_hz``) or, for the format only, from a file extension whose meaning is settled by
common practice (``.cu8``, ``.cs16``, ``.cf32``, ...). The SigMF reader uses the same
formats and the same block reader, with the datatype and rate from its metadata.

Blocks are read through a memory map opened for each block and closed after it, so the
resident memory stays at one block however large the file: a single map of the whole file
would keep every page read resident (and counted) until the kernel wants it back.

References
----------
.. [1] The GNU Radio Foundation, "Signal Metadata Format (SigMF) specification", v1.2,
   section "Dataset format" (datatype names ``<c|r><f|i|u><bits>[_le|_be]``).
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import CaptureError, ParameterError
from . import Capture, check_finite, check_rate, read_failure

_NAME = re.compile(r"^(?P<kind>[cr])(?P<base>[fiu])(?P<bits>8|16|32|64)(?:_(?P<order>le|be))?$")

#: File extensions whose format is settled by common practice (not by any standard), to
#: SigMF datatypes. ``.iq``, ``.raw``, ``.bin`` and ``.dat`` are left out on purpose: files of
#: every format carry them, so they need ``iq_format``.
EXTENSIONS = {
    ".cu8": "cu8",
    ".cs8": "ci8",
    ".ci8": "ci8",
    ".cs16": "ci16_le",
    ".sc16": "ci16_le",
    ".ci16": "ci16_le",
    ".cs32": "ci32_le",
    ".cu16": "cu16_le",
    ".cf32": "cf32_le",
    ".fc32": "cf32_le",
    ".cfile": "cf32_le",
    ".cf64": "cf64_le",
}

#: Extensions of raw files whose format cannot be told from the name.
AMBIGUOUS_EXTENSIONS = (".iq", ".raw", ".bin", ".dat", ".sigmf-data")


@dataclass(frozen=True)
class SampleFormat:
    """How samples are stored: a SigMF datatype, and the scaling to full scale 1.0."""

    name: str  # the SigMF datatype, e.g. "ci16_le"
    component: np.dtype  # one I or Q component (or one real sample), byte order included
    is_complex: bool
    offset: float  # subtracted before scaling: the mid-code of unsigned formats, else 0
    scale: float  # multiplies (code - offset) to give full scale 1.0

    @property
    def sample_bytes(self) -> int:
        """Bytes of one sample of one channel (both components for complex)."""
        return self.component.itemsize * (2 if self.is_complex else 1)

    @property
    def out_dtype(self) -> np.dtype:
        """What :meth:`convert` returns: complex64/float32, or 128/64-bit for 64-bit floats."""
        wide = self.component.kind == "f" and self.component.itemsize == 8
        if self.is_complex:
            return np.dtype(np.complex128 if wide else np.complex64)
        return np.dtype(np.float64 if wide else np.float32)

    def convert(self, raw: np.ndarray) -> np.ndarray:
        """Stored components (1-D, interleaved) to samples at full scale 1.0 (1-D).

        Examples
        --------
        >>> fmt = sample_format("cu8")
        >>> fmt.convert(np.array([0, 255, 127, 128], dtype=np.uint8))
        array([-1.        +1.j        , -0.00392157+0.00392157j], dtype=complex64)
        """
        if self.component.kind == "f":
            # a plain array (not a memmap), copied out of the map, in native byte order
            x = np.array(raw, dtype=self.component.newbyteorder("="))
        else:
            x = np.array(raw, dtype=np.float32)
            if self.offset:
                x -= np.float32(self.offset)
            x *= np.float32(self.scale)
        return x.view(self.out_dtype) if self.is_complex else x


def sample_format(name: str) -> SampleFormat | None:
    """The format of a SigMF datatype name, or None if it is not one okdecode reads.

    Signed integers of b bits are scaled by ``2**-(b - 1)`` (so ``-2**(b-1)`` is -1.0);
    unsigned ones are offset-binary around the mid-code ``m = (2**b - 1) / 2`` and scaled by
    ``1 / m`` (so ``cu8`` is ``(code - 127.5) / 127.5``, from 0 and 255 to exactly -1 and +1);
    floats are taken as they are. 8-bit names have no byte order, wider ones must state it
    [1]_, and floats are 32 or 64 bits.

    Examples
    --------
    >>> fmt = sample_format("ci16_be")
    >>> fmt.component.str, fmt.sample_bytes, fmt.scale
    ('>i2', 4, 3.0517578125e-05)
    >>> sample_format("cf16_le") is None, sample_format("ci16") is None
    (True, True)
    """
    m = _NAME.match(str(name).strip().lower())
    if m is None:
        return None
    base, bits, order = m["base"], int(m["bits"]), m["order"]
    if (bits == 8) != (order is None):
        return None
    if base == "f" and bits not in (32, 64):
        return None
    if base == "i" and bits == 64 or base == "u" and bits == 64:
        return None
    char = {"f": "f", "i": "i", "u": "u"}[base]
    endian = "|" if bits == 8 else ("<" if order == "le" else ">")
    component = np.dtype(f"{endian}{char}{bits // 8}")
    if base == "f":
        offset, scale = 0.0, 1.0
    elif base == "i":
        offset, scale = 0.0, 2.0 ** -(bits - 1)
    else:
        mid = (2.0**bits - 1) / 2
        offset, scale = mid, 1.0 / mid
    return SampleFormat(name=m.group(0), component=component, is_complex=m["kind"] == "c",
                        offset=offset, scale=scale)


#: Every datatype okdecode reads, complex first, for messages.
FORMAT_NAMES = tuple(
    f"{k}{b}{s}" for k in "cr" for b in ("u8", "i8", "i16", "u16", "i32", "u32", "f32", "f64")
    for s in (("",) if b.endswith("8") else ("_le", "_be"))
)


def block_reader(path: Path, fmt: SampleFormat, segments: Sequence[tuple[int, int]], *,
                 n_channels: int, source: str) -> Callable[[int], Iterator[np.ndarray]]:
    """A reader of ``(n, n_channels)`` blocks from stretches of a file.

    Parameters
    ----------
    path : Path
        The file holding the samples.
    fmt : SampleFormat
    segments : sequence of (int, int)
        ``(byte_offset, n_samples)`` of each stretch of samples, in order (one for a plain
        raw file; SigMF segments with header bytes give several).
    n_channels : int
        Channels interleaved sample by sample.
    source : str
        Name used in messages.
    """
    frame_bytes = fmt.sample_bytes * n_channels
    per_frame = (2 if fmt.is_complex else 1) * n_channels
    check = fmt.component.kind == "f"  # integer codes are always finite

    def reader(block_len: int) -> Iterator[np.ndarray]:
        index = 0
        try:
            with open(path, "rb") as f:
                for byte_offset, n_samples in segments:
                    for start in range(0, n_samples, block_len):
                        count = min(block_len, n_samples - start)
                        raw = np.memmap(f, dtype=fmt.component, mode="r",
                                        offset=byte_offset + start * frame_bytes,
                                        shape=(count * per_frame,))
                        block = fmt.convert(raw).reshape(count, n_channels)
                        del raw  # unmapped here, so resident memory stays at one block
                        if check:
                            check_finite(block, source, index)
                        index += count
                        yield block
        except CaptureError:
            raise
        except (OSError, ValueError) as err:  # CaptureError is a ValueError: caught first
            raise read_failure(source, index, err) from err

    return reader


def infer_format(path: Path, iq_format: str | None, *, source: str
                 ) -> tuple[SampleFormat, tuple[str, ...]]:
    """The sample format of a raw file: given, or from its extension (said in a note).

    Raises
    ------
    ParameterError
        If ``iq_format`` names no format okdecode reads.
    CaptureError
        If no format is given and the extension does not tell it.
    """
    if iq_format is not None:
        fmt = sample_format(iq_format)
        if fmt is None:
            hint = ""
            if re.fullmatch(r"[cr][iuf](16|32|64)", str(iq_format).strip().lower()):
                hint = f" (add the byte order: {str(iq_format).strip().lower()}_le or _be)"
            raise ParameterError(source, f"I/Q format {iq_format!r} is unknown{hint}",
                                 expected="a SigMF datatype: " + ", ".join(FORMAT_NAMES))
        return fmt, ()
    suffix = path.suffix.lower()
    name = EXTENSIONS.get(suffix)
    if name is None and sample_format(suffix.lstrip(".")) is not None:
        name = suffix.lstrip(".")  # an extension that is itself a datatype: "x.ci16_le"
    if name is None:
        raise CaptureError(source, f"raw samples of unknown format ({suffix or 'no extension'}); "
                           "pass --iq-format with a SigMF datatype such as cu8, ci16_le or "
                           "cf32_le")
    fmt = sample_format(name)
    assert fmt is not None
    return fmt, (f"format {name} inferred from the extension {suffix}",)


def read_iq(path: Path, *, source: str, iq_format: str | None = None,
            rate_hz: float | None = None, center_hz: float | None = None) -> Capture:
    """Open a raw file of interleaved I/Q (or real) samples for block reading.

    Parameters
    ----------
    path : Path
        The file: samples only, no header.
    source : str
        Name used in messages.
    iq_format : str, optional
        SigMF datatype (``cu8``, ``ci8``, ``ci16_le``, ``cf32_le``, ... or real ``ri16_le``,
        ...); inferred from the extension where that is unambiguous (see ``EXTENSIONS``).
    rate_hz : float
        Sample rate, Hz; a raw file cannot tell it.
    center_hz : float, optional
        Frequency of baseband 0 Hz, Hz, so that reported frequencies are absolute.

    Returns
    -------
    Capture
        ``kind="iq"``; complex64 blocks (complex128 for ``cf64``), full scale 1.0.

    Raises
    ------
    CaptureError
        If the rate or the format is missing, or the byte count is not a whole number of
        samples.
    ParameterError
        If the rate or the format is absurd.
    """
    fmt, notes = infer_format(path, iq_format, source=source)
    if rate_hz is None:
        raise CaptureError(source, "raw I/Q has no sample rate; pass --rate HZ")
    rate = check_rate(rate_hz, source)
    center = 0.0 if center_hz is None else check_center(center_hz, source)
    size = path.stat().st_size
    n_samples, extra = divmod(size, fmt.sample_bytes)
    if extra or n_samples == 0:
        raise CaptureError(source, f"{size} bytes is not a whole number of {fmt.name} samples",
                           expected=f"a multiple of {fmt.sample_bytes} bytes (check --iq-format)")
    reader = block_reader(path, fmt, [(0, n_samples)], n_channels=1, source=source)
    kind = "complex I/Q" if fmt.is_complex else "real samples"
    notes = (*notes, f"raw {fmt.name} {kind}, {rate:g} Hz")
    meta = {"global": {"core:datatype": fmt.name, "core:sample_rate": rate,
                       "core:dataset": path.name},
            "captures": [{"core:sample_start": 0, **({"core:frequency": center}
                                                     if center_hz is not None else {})}],
            "annotations": []}
    return Capture(source=source, rate_hz=rate, n_samples=int(n_samples), n_channels=1,
                   is_complex=fmt.is_complex, kind="iq", reader=reader, center_hz=center,
                   channel_names=("0",), notes=notes,
                   metadata={"sigmf": meta, "path": str(path), "format": fmt.name})


def check_center(center_hz: object, source: str) -> float:
    """A centre frequency as float, or ParameterError."""
    try:
        value = float(center_hz)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        value = float("nan")
    if not np.isfinite(value) or abs(value) > 1e12:
        raise ParameterError(source, f"centre frequency {center_hz!r} Hz",
                             expected="a finite frequency, Hz")
    return value
