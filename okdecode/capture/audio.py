"""Audio captures (WAV, FLAC, OGG, and whatever else libsndfile reads) via soundfile.

libsndfile reads a RIFF WAV whose data chunk claims more bytes than the file holds without
complaint, as if the missing tail were never there, so the RIFF chunk list is checked here
first [1]_; and a text file given a ``.wav`` name is told apart from damaged audio.

References
----------
.. [1] Microsoft and IBM, "Multimedia Programming Interface and Data Specifications 1.0",
   1991, chapter 3 (RIFF chunks: a four-byte id, a 32-bit little-endian size, the data, a
   pad byte after odd sizes; "RIFX" is the big-endian form).
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import numpy as np
import soundfile

from ..errors import CaptureError
from . import Capture, check_finite, looks_like_text

#: Leading bytes of the containers libsndfile reads, so a text file is not mistaken for one.
MAGIC = (b"RIFF", b"RIFX", b"RF64", b"BW64", b"fLaC", b"OggS", b"FORM", b".snd", b"caff")


def check_riff(path: Path, *, source: str) -> None:
    """Raise CaptureError if a RIFF WAV file is shorter than its chunks say.

    Files that are not RIFF WAVE (FLAC, OGG, RF64, ...) are left to libsndfile. A data
    chunk whose size field is 0 or 0xFFFFFFFF (written by a recorder before it knew the
    length) is accepted: the samples run to the end of the file.
    """
    size = path.stat().st_size
    with open(path, "rb") as f:
        head = f.read(12)
        if len(head) < 12 or head[:4] not in (b"RIFF", b"RIFX") or head[8:12] != b"WAVE":
            return
        order = "big" if head[:4] == b"RIFX" else "little"
        pos = 12
        while pos + 8 <= size:
            f.seek(pos)
            chunk = f.read(8)
            chunk_id, n = chunk[:4], int.from_bytes(chunk[4:], order)
            if chunk_id == b"data":
                left = size - pos - 8
                if n not in (0, 0xFFFFFFFF) and n > left:
                    raise CaptureError(source, f"truncated: the WAV data chunk declares {n} "
                                       f"bytes but the file holds {left}",
                                       expected="a complete WAV file")
                return
            pos += 8 + n + (n & 1)
    raise CaptureError(source, "truncated: the file ends before the WAV data chunk",
                       expected="a complete WAV file")


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
    with open(path, "rb") as f:
        head = f.read(4096)
    if not head.startswith(MAGIC) and looks_like_text(head):
        what = path.suffix.lstrip(".").upper() or "an audio file"
        raise CaptureError(source, f"is a text file, not {what} audio",
                           expected="a WAV, FLAC or OGG recording (a trace export reads "
                           "under a .csv or .txt name)")
    check_riff(path, source=source)
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
