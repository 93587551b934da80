"""NumPy ``.npy`` arrays: real or complex samples from a user's own scripts.

The header is read by NumPy's own format module with pickles refused, so a file can hold
numbers and nothing that runs code. The samples are read in blocks through a memory map
opened per block, as for raw I/Q (see :mod:`okdecode.capture.iq`).

References
----------
.. [1] NumPy Enhancement Proposal 1, "A simple file format for NumPy arrays" (NEP 1), and
   the ``numpy.lib.format`` documentation (header layout, versions 1.0 to 3.0).
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import numpy as np

from ..errors import CaptureError
from . import Capture, check_finite, check_rate, read_failure

#: Beyond this many columns, an array with more columns than rows is taken to be stored
#: channels-first, which okdecode does not guess at.
_MAX_CHANNELS = 64


def read_npy(path: Path, *, source: str, rate_hz: float | None = None,
             center_hz: float | None = None) -> Capture:
    """Open a ``.npy`` array of samples for block reading.

    Parameters
    ----------
    path : Path
        The file: shape ``(n,)`` or ``(n, channels)``; float, complex (I/Q baseband) or
        integer samples.
    source : str
        Name used in messages.
    rate_hz : float
        Sample rate, Hz; an array cannot tell it.
    center_hz : float, optional
        For complex samples: the frequency of baseband 0 Hz, Hz.

    Returns
    -------
    Capture
        ``kind="npy"``. Floats are taken as they are (full scale 1.0); integers are
        scaled as the SigMF fixed-point types are: signed b-bit codes by ``2**-(b-1)``,
        unsigned ones around their mid-code (see :func:`okdecode.capture.iq.sample_format`).

    Raises
    ------
    CaptureError
        If the file is not a ``.npy`` array of numbers (object arrays are refused without
        unpickling them), is empty or of a shape that is not ``(n,)`` or ``(n, channels)``,
        holds NaN or infinity, or the rate is missing.
    """
    with open(path, "rb") as f:
        magic = f.read(6)
    if magic != b"\x93NUMPY":
        raise CaptureError(source, "not a NumPy .npy file (no .npy header)",
                           expected="an array saved with numpy.save")
    try:
        # numpy's own header reader; a memory map reads no samples yet, and pickles are
        # refused before anything is unpickled
        mapped = np.load(path, mmap_mode="r", allow_pickle=False)
    except (ValueError, OSError, EOFError) as err:
        raise CaptureError(source, f"not a readable NumPy .npy file ({_why(path, err)})",
                           expected="an array saved with numpy.save") from err
    if not isinstance(mapped, np.memmap):
        if hasattr(mapped, "close"):
            mapped.close()
        raise CaptureError(source, "not a NumPy .npy file", expected="an array saved "
                           "with numpy.save")
    shape, dtype, data_offset = mapped.shape, mapped.dtype, int(mapped.offset)
    fortran = bool(mapped.flags.f_contiguous and not mapped.flags.c_contiguous)
    del mapped
    if dtype.hasobject or dtype.fields is not None or dtype.kind not in "iufc" or (
            dtype == np.bool_):
        raise CaptureError(source, f"array of {dtype}", expected="real or complex numbers")
    if len(shape) not in (1, 2) or 0 in shape:
        raise CaptureError(source, f"array of shape {shape}",
                           expected="(n,) or (n, channels) with n > 0")
    n_samples = int(shape[0])
    n_channels = int(shape[1]) if len(shape) == 2 else 1
    if n_channels > _MAX_CHANNELS and n_channels > n_samples:
        raise CaptureError(source, f"array of shape {shape}: {n_channels} channels of "
                           f"{n_samples} samples", expected="(n, channels); transpose it")
    if rate_hz is None:
        raise CaptureError(source, "a NumPy array has no sample rate; pass --rate HZ")
    rate = check_rate(rate_hz, source)
    is_complex = dtype.kind == "c"
    scale, offset = 1.0, 0.0
    if dtype.kind in "iu":
        bits = 8 * dtype.itemsize
        if dtype.kind == "i":
            scale = 2.0 ** -(bits - 1)
        else:
            offset = (2.0**bits - 1) / 2
            scale = 1.0 / offset
    out_dtype = np.dtype({(True, 16): np.complex128, (True, 8): np.complex64}.get(
        (is_complex, dtype.itemsize), np.complex64 if is_complex else
        np.float64 if dtype == np.float64 else np.float32))

    def convert(raw: np.ndarray) -> np.ndarray:
        if dtype.kind in "fc":
            return np.array(raw, dtype=out_dtype)  # a plain array, copied out of the map
        x = np.array(raw, dtype=np.float32)
        if offset:
            x -= np.float32(offset)
        x *= np.float32(scale)
        return x

    def reader(block_len: int) -> Iterator[np.ndarray]:
        index = 0
        try:
            with open(path, "rb") as f:
                if fortran and n_channels > 1:  # column-major: map it whole, read rows
                    mm = np.memmap(f, dtype=dtype, mode="r", offset=data_offset,
                                   shape=(n_samples, n_channels), order="F")
                    for start in range(0, n_samples, block_len):
                        block = convert(np.ascontiguousarray(mm[start : start + block_len]))
                        check_finite(block, source, start)
                        yield block
                    return
                for start in range(0, n_samples, block_len):
                    count = min(block_len, n_samples - start)
                    raw = np.memmap(f, dtype=dtype, mode="r", shape=(count, n_channels),
                                    offset=data_offset + start * n_channels * dtype.itemsize)
                    block = convert(raw)
                    del raw
                    check_finite(block, source, start)
                    index = start + count
                    yield block
        except CaptureError:
            raise
        except (OSError, ValueError) as err:  # CaptureError is a ValueError: caught first
            raise read_failure(source, index, err) from err

    kind = "complex I/Q" if is_complex else "real samples"
    return Capture(source=source, rate_hz=rate, n_samples=n_samples, n_channels=n_channels,
                   is_complex=is_complex, kind="npy", reader=reader,
                   center_hz=0.0 if center_hz is None else float(center_hz),
                   channel_names=tuple(str(i) for i in range(n_channels)),
                   notes=(f".npy array of {dtype.name} {kind}, {rate:g} Hz",))


def _why(path: Path, err: Exception) -> str:
    """NumPy's reason for refusing a file, or the truncation it means."""
    try:
        with open(path, "rb") as f:
            version = np.lib.format.read_magic(f)
            read = (np.lib.format.read_array_header_1_0 if version == (1, 0)
                    else np.lib.format.read_array_header_2_0)
            shape, _, dtype = read(f)
            need = int(np.prod(shape)) * dtype.itemsize
            have = path.stat().st_size - f.tell()
    except (ValueError, OSError, EOFError):
        return str(err)
    if have < need:
        return f"truncated: the header declares {need} bytes of samples, the file holds {have}"
    return str(err)
