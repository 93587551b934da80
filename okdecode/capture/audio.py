"""Audio captures (WAV, FLAC, OGG, and whatever else libsndfile reads) via soundfile."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import numpy as np
import soundfile

from ..errors import CaptureError
from . import Capture, check_finite


def read_audio(path: Path, *, source: str) -> Capture:
    """Open an audio file for block reading.

    Parameters
    ----------
    path : Path
        The file; any format and sample encoding libsndfile reads.
    source : str
        Name used in messages.

    Returns
    -------
    Capture
        Real samples scaled to full scale 1.0 (dBFS refers to it).

    Raises
    ------
    CaptureError
        If libsndfile cannot read it, or it holds no samples.
    """
    try:
        with soundfile.SoundFile(str(path)) as f:
            rate_hz, n_frames, n_channels = float(f.samplerate), f.frames, f.channels
            fmt, subtype = f.format, f.subtype
    except (soundfile.LibsndfileError, RuntimeError, TypeError) as err:
        raise CaptureError(source, "not a readable audio file", expected="WAV, FLAC or OGG "
                           "audio") from err
    if n_frames <= 0:
        raise CaptureError(source, "holds no audio samples", expected="a non-empty recording")
    if rate_hz <= 0:
        raise CaptureError(source, f"sample rate {rate_hz:g} Hz", expected="a rate > 0")

    def reader(block_len: int) -> Iterator[np.ndarray]:
        offset = 0
        try:
            with soundfile.SoundFile(str(path)) as f:
                # float32 halves the memory traffic; the stages compute in float64 anyway
                for block in f.blocks(blocksize=block_len, dtype="float32", always_2d=True):
                    check_finite(block, source, offset)
                    offset += block.shape[0]
                    yield block
        except soundfile.LibsndfileError as err:
            raise CaptureError(source, f"read failed after {offset} samples ({err})",
                               expected="a complete audio file") from err
        if offset < n_frames // 2:
            raise CaptureError(source, f"ends after {offset} of {n_frames} samples",
                               expected="a complete audio file")

    return Capture(source=source, rate_hz=rate_hz, n_samples=int(n_frames),
                   n_channels=n_channels, is_complex=False, kind="audio", reader=reader,
                   notes=(f"{fmt} {subtype}, {rate_hz:g} Hz, {n_channels} channel(s)",),
                   channel_names=tuple(str(i) for i in range(n_channels)))
