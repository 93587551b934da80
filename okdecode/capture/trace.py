"""Oscilloscope and logger traces: CSV or text exports, sniffed, then parsed fast.

The layout is read from the first lines (:func:`sniff`): the separator (comma, semicolon,
tab or blanks), decimal commas, quoted fields, metadata lines before the header row, a
second header row of units, the time column and its unit. The sample rate comes, in this
order, from the ``rate_hz`` option, the time column, or a sample-interval (or sample-rate)
line among the metadata.

The numbers are parsed in chunks of a few megabytes, each by one vectorised pass: the
separators and line ends are located with NumPy to check that every line has the same
number of fields, and ``numpy.fromstring`` converts the whole chunk at once. A chunk that
this fast path refuses (a blank line, a word, a missing field) is parsed again line by line
by :func:`_parse_lines`, the reference, which either returns the same numbers or raises a
:class:`CaptureError` naming the line, the column and what it found. The signal columns are
kept as float32 (in memory, or beyond ``SPILL_BYTES`` in an unnamed temporary file), so
later passes read them in blocks without parsing again.
"""

from __future__ import annotations

import csv
import io
import math
import os
import re
import tempfile
import warnings
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from os import PathLike
from typing import IO

import numpy as np

from ..errors import CaptureError, ParameterError
from . import Capture, check_rate, looks_like_text

#: Bytes of text parsed at a time.
CHUNK_BYTES = 1 << 23
#: Bytes read to sniff the layout.
HEAD_BYTES = 1 << 16
#: Lines read to sniff the layout, at most.
SNIFF_LINES = 400
#: Parsed samples beyond this many bytes go to a temporary file instead of memory.
SPILL_BYTES = 1 << 27
#: Candidate separators, in order of preference; " " stands for runs of blanks.
SEPARATORS = (",", ";", "\t", " ")
#: What a blank line may hold.
_BLANK = " \t\r"
#: Stand-in separator for fields that are all quoted (a control character no export uses).
_UNIT_SEP = "\x1f"

_NUMBER = re.compile(r"[+-]?(?:(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?|inf|infinity|nan)",
                     re.IGNORECASE)
_TIME_NAME = re.compile(
    r"^(?P<name>time|t|x|x-axis|zeit|temps|tiempo|seconds?|secs?)"
    r"(?:\s*[(\[{/_\s]\s*(?P<unit>[a-zµμ]+)\s*[)\]}]?)?$", re.IGNORECASE)
_INDEX_NAME = re.compile(r"^(no\.?|nr\.?|index|idx|sample|samples|n|#|point|points)$",
                         re.IGNORECASE)
#: Time units, to seconds.
TIME_UNITS = {"s": 1.0, "sec": 1.0, "secs": 1.0, "second": 1.0, "seconds": 1.0,
              "ms": 1e-3, "us": 1e-6, "µs": 1e-6, "μs": 1e-6, "ns": 1e-9, "ps": 1e-12}
_INTERVAL_KEY = re.compile(
    r"(sampl\w*\s*(interval|period|time|spacing))|x\s*-?\s*incr\w*|xinc|"
    r"time\s*(step|incr\w*|interval|resolution)|^dt$|^delta\s*t$|^(sample\s*)?interval$|"
    r"horizontal\s*(interval|incr\w*)|^increment$", re.IGNORECASE)
_RATE_KEY = re.compile(r"(sampl\w*\s*(rate|freq\w*))|^fs$|^samplerate$|^rate$",
                       re.IGNORECASE)
_RATE_UNIT = re.compile(r"^(?P<prefix>[kKmMgG]?)(hz|sa/s|s/s|sps|samples?/s)$", re.IGNORECASE)
_PREFIX = {"": 1.0, "k": 1e3, "m": 1e6, "g": 1e9}  # "MSa/s" and "mhz" alike mean mega


@dataclass(frozen=True)
class Layout:
    """How a trace is written, as sniffed from its first lines."""

    sep: str  # ",", ";", "\t", or " " for runs of blanks
    decimal_comma: bool
    quoted: bool  # data fields carry quotes
    all_quoted: bool  # every data field is quoted (separators may hide inside)
    trailing_sep: bool  # data lines end with a separator
    integers: bool  # the first data rows hold integers only (codes of an ADC)
    fast: bool  # the vectorised parse applies (False: line by line throughout)
    n_fields: int
    names: tuple[str, ...]  # one per field: the header, or "column 1", ...
    units: tuple[str, ...]  # from a units row, "" where none
    header_line: int | None  # 1-based line number of the header row
    data_line: int  # 1-based line number of the first data row
    data_offset: int  # byte offset of the first data row
    metadata: tuple[str, ...]  # the lines before the header


def _number(field: str) -> float | None:
    """A field as a number, or None. One comma stands for a decimal point if no point does."""
    f = field.strip(" \t\r")
    if "," in f and "." not in f and f.count(",") == 1:
        f = f.replace(",", ".")
    if not _NUMBER.fullmatch(f):
        return None
    return float(f)


def _split(text: str, sep: str) -> list[str] | None:
    """Fields of a line (quotes removed); None if it cannot be split."""
    if sep == " ":
        return [f.strip('"') for f in text.split()]
    if '"' not in text:
        fields = text.split(sep)
    else:
        try:
            fields = next(csv.reader([text], delimiter=sep, quotechar='"', strict=True))
        except (csv.Error, StopIteration):
            return None
    return [f.strip(" \t\r") for f in fields]


def _line_fields(text: str, sep: str) -> list[str] | None:
    fields = _split(text, sep)
    if fields and len(fields) > 1 and fields[-1] == "":
        fields = fields[:-1]  # a separator ending the line
    return fields


def sniff(head: bytes, *, at_eof: bool, source: str) -> Layout:
    """The layout of a trace from its first bytes.

    The data start at the first two lines in a row whose fields are all numbers, split
    the same way into the same number of fields (or at a single such line at the end of
    the file); of the separators that find such lines, the one giving the most fields
    wins. The line before the data is the header if it has as many fields and they are not
    all numbers; a header that reads as units ("s", "V") takes its names from the line
    above it. Earlier lines are metadata.

    Raises
    ------
    CaptureError
        If no line of numbers is found.
    """
    raw_lines = head.split(b"\n", SNIFF_LINES)
    if not at_eof or len(raw_lines) > SNIFF_LINES:
        raw_lines = raw_lines[:-1]  # cut off in the middle, or beyond the lines sniffed
        at_eof = False
    if not raw_lines or (len(raw_lines) == 1 and not raw_lines[0].strip(_BLANK.encode())):
        raise CaptureError(source, "no complete line in the first "
                           f"{len(head)} bytes", expected="a text trace, one sample per line")
    lines = [ln.decode("utf-8", errors="replace").rstrip("\r") for ln in raw_lines]
    best = None
    for rank, sep in enumerate(SEPARATORS):
        split = [_line_fields(t, sep) if t.strip(_BLANK) else None for t in lines]
        numeric = [f is not None and len(f) > 0 and all(_number(x) is not None for x in f)
                   for f in split]
        filled = [i for i, t in enumerate(lines) if t.strip(_BLANK)]
        for k, i in enumerate(filled):
            if not numeric[i]:
                continue
            nxt = filled[k + 1] if k + 1 < len(filled) else None
            if nxt is None:
                if not at_eof:
                    continue
            elif not (numeric[nxt] and len(split[nxt]) == len(split[i])):
                continue
            key = (len(split[i]), -i, -rank)
            if best is None or key > best[0]:
                best = (key, sep, i, split)
            break
    if best is None:
        raise CaptureError(source, f"no rows of numbers in the first {len(lines)} lines",
                           expected="a trace: rows of numbers separated by commas, "
                           "semicolons, tabs or blanks")
    _, sep, start, split = best
    n_fields = len(split[start])
    filled = [i for i, t in enumerate(lines) if t.strip(_BLANK)]
    before = [i for i in filled if i < start]
    header = before[-1] if before and split[before[-1]] is not None and len(
        split[before[-1]]) == n_fields else None
    names: tuple[str, ...] = tuple(f"column {j + 1}" for j in range(n_fields))
    units: tuple[str, ...] = ("",) * n_fields
    meta_end = start
    if header is not None:
        fields = split[header]
        meta_end = header
        if _looks_like_units(fields) and len(before) >= 2 and split[before[-2]] is not None \
                and len(split[before[-2]]) == n_fields:
            units = tuple(fields)
            names = tuple(f or n for f, n in zip(split[before[-2]], names, strict=True))
            meta_end = before[-2]
        else:
            names = tuple(f or n for f, n in zip(fields, names, strict=True))
    run = [split[i] for i in filled if i >= start][:64]
    raw_run = [lines[i] for i in filled if i >= start][:64]
    quoted = any('"' in t for t in raw_run)
    all_quoted = quoted and sep != " " and all(_all_quoted(t, sep) for t in raw_run)
    decimal_comma = any("," in f for fields in run if fields for f in fields)
    trailing_sep = sep != " " and any(t.rstrip(" \t\r").endswith(sep) for t in raw_run)
    # the fast path cannot see a separator inside quotes unless every field is quoted, nor
    # tell a decimal comma from a comma separator
    hidden = quoted and not all_quoted and any(sep in f or (sep == " " and " " in f)
                                               for fields in run if fields for f in fields)
    fast = not hidden and not (decimal_comma and sep == "," and not all_quoted)
    integers = all(re.fullmatch(r"[+-]?\d{1,18}", f) for fields in run if fields for f in fields)
    data_offset = sum(len(raw) + 1 for raw in raw_lines[:start])
    return Layout(sep=sep, decimal_comma=decimal_comma, quoted=quoted, all_quoted=all_quoted,
                  trailing_sep=trailing_sep, integers=integers, fast=fast, n_fields=n_fields,
                  names=names,
                  units=units, header_line=None if header is None else header + 1,
                  data_line=start + 1, data_offset=data_offset,
                  metadata=tuple(lines[i] for i in filled if i < meta_end))


def _all_quoted(text: str, sep: str) -> bool:
    """Whether every field of a line is in quotes (a separator may end the line)."""
    field = r'\s*"[^"]*"\s*'
    return re.fullmatch(f"{field}(?:{re.escape(sep)}{field})*(?:{re.escape(sep)}\\s*)?",
                        text) is not None


def _looks_like_units(fields: Sequence[str]) -> bool:
    """Whether a header row reads as units ("s", "(V)", "[ms]") rather than names."""
    bare = [f.strip("()[]{} ").lower() for f in fields]
    return all(re.fullmatch(r"[a-zµμ°%/]{0,8}", b) for b in bare) and any(
        b in TIME_UNITS for b in bare)


def _time_scale(name: str, unit: str, source: str) -> float | None:
    """Seconds per unit of a column if it is a time column, else None."""
    m = _TIME_NAME.match(name.strip())
    u = unit.strip("()[]{} ").lower()
    if m is None:
        return TIME_UNITS.get(u) if u else None
    written = (m["unit"] or u or "").lower()
    if not written:
        return 1.0  # a time column without a unit is in seconds (common practice)
    if written not in TIME_UNITS:
        raise CaptureError(source, f"the time column {name!r} is in {written!r}",
                           expected="a time unit: " + ", ".join(sorted(set(TIME_UNITS))))
    return TIME_UNITS[written]


def _metadata_rate(lines: Sequence[str], sep: str) -> tuple[float, str] | None:
    """A sample rate from a sample-interval or sample-rate line among the metadata."""
    for line in lines:
        fields = _line_fields(line, sep) if sep != " " else None
        if not fields or len(fields) < 2:
            m = re.match(r"^\s*([^:=]+?)\s*[:=]\s*(.+)$", line)
            if m is None:
                continue
            fields = [m[1], *m[2].split()]
        key = fields[0].strip(' "')
        rest = " ".join(f for f in fields[1:] if f).strip()
        m = re.match(r"^([+-]?[\d.,]+(?:[eE][+-]?\d+)?)\s*([^\s,;]*)", rest)
        if m is None:
            continue
        value = _number(m[1])
        if value is None or not math.isfinite(value) or value <= 0:
            continue
        unit = m[2] or (fields[2].strip() if len(fields) > 2 else "")
        if _INTERVAL_KEY.search(key):
            scale = TIME_UNITS.get(unit.lower(), 1.0 if not unit else None)
            if scale is not None:
                return 1.0 / (value * scale), line.strip()
        elif _RATE_KEY.search(key):
            um = _RATE_UNIT.match(unit) if unit else None
            if not unit or um:
                prefix = _PREFIX[um["prefix"].lower()] if um else 1.0
                return value * prefix, line.strip()
    return None


# ---------------------------------------------------------------------------------------
# Parsing


class _Chunks:
    """Complete lines of text from a binary stream, a few megabytes at a time."""

    def __init__(self, f: IO[bytes], first_line: int):
        self._f, self.line = f, first_line  # line: number of the first line of the next chunk

    def __iter__(self) -> Iterator[tuple[bytes, int, int]]:
        rest = b""
        while True:
            block = self._f.read(CHUNK_BYTES)
            if not block:
                break
            buf = rest + block
            cut = buf.rfind(b"\n")
            if cut < 0:
                rest = buf
                continue
            chunk, rest = buf[: cut + 1], buf[cut + 1 :]
            first, n_lines = self.line, chunk.count(b"\n")
            self.line += n_lines
            yield chunk, first, n_lines
        if rest.strip():
            yield rest + b"\n", self.line, 1


def _fromstring(text: bytes, dtype: type, sep: str, size: int) -> np.ndarray | None:
    """``numpy.fromstring`` of exactly ``size`` numbers, or None."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")  # "could not be read to its end" is a warning
            values = np.fromstring(text, dtype=dtype, sep=sep)
    except (ValueError, DeprecationWarning):
        return None
    return values if values.size == size else None


def _fast_parse(chunk: bytes, layout: Layout, n_rows: int) -> np.ndarray | None:
    """All numbers of a chunk of ``n_rows`` lines in one vectorised pass, or None.

    The numbers come as float64, or as int64 where every field is an integer.

    None means this path does not apply (a blank line, a word, a missing field, ...):
    the caller parses the chunk line by line.
    """
    n = layout.n_fields
    work = chunk
    sep = layout.sep.encode()
    if layout.trailing_sep:
        work = work.replace(sep + b"\r\n", b"\n").replace(sep + b"\n", b"\n")
    if layout.all_quoted:
        work = work.replace(b'"' + sep + b'"', _UNIT_SEP.encode())
        sep = _UNIT_SEP.encode()
    if layout.quoted:
        work = work.replace(b'"', b"")
    if layout.decimal_comma:
        work = work.replace(b",", b".")
    if layout.sep == " ":
        # fields start after blanks; every line must have n of them
        u = np.frombuffer(work, dtype=np.uint8)
        blank = (u == 32) | (u == 9) | (u == 13) | (u == 10)
        starts = np.flatnonzero(~blank[1:] & blank[:-1]) + 1
        if u.size and not blank[0]:
            starts = np.concatenate([[0], starts])
        ends = np.flatnonzero(u == 10)
        per_line = np.diff(np.searchsorted(starts, ends), prepend=0)
        if ends.size != n_rows or not (per_line == n).all():
            return None
        text, fsep = work, " "
    else:
        if n == 1:
            if sep in work:  # a line with more than one field
                return None
        else:
            u = np.frombuffer(work, dtype=np.uint8)
            tokens = np.flatnonzero((u == sep[0]) | (u == 10))
            if tokens.size != n_rows * n or not (u[tokens[n - 1 :: n]] == 10).all():
                return None
        # separators where the line ends: fromstring then reads the chunk as one list
        text, fsep = work.replace(b"\n", sep), sep.decode()
    if layout.integers:
        # integers parse several times faster than floats; int64 saturates silently on
        # overflow, so a saturated value sends the chunk to the float parse
        codes = _fromstring(text, np.int64, fsep, n_rows * n)
        if codes is not None and codes.size and codes.max() < 2**63 - 1 and (
                codes.min() > -(2**63)):
            return codes.reshape(n_rows, n)  # int64: finite, and within float32's range
    values = _fromstring(text, np.float64, fsep, n_rows * n)
    return None if values is None else values.reshape(n_rows, n)


def _parse_lines(chunk: bytes, layout: Layout, first_line: int, *, source: str
                 ) -> tuple[np.ndarray, np.ndarray]:
    """The reference parse, line by line: the numbers and the line number of each row.

    Blank lines are skipped. Raises CaptureError at the first line that is not a row of
    ``layout.n_fields`` numbers.
    """
    rows, numbers = [], []
    n = layout.n_fields
    for k, raw in enumerate(chunk.split(b"\n")[:-1]):
        line_no = first_line + k
        text = raw.decode("utf-8", errors="replace").rstrip("\r")
        if not text.strip(_BLANK):
            continue
        fields = _line_fields(text, layout.sep)
        if fields is None:
            raise CaptureError(source, f"line {line_no} cannot be split into fields "
                               "(unbalanced quotes?)", expected=f"{n} numbers")
        if len(fields) != n:
            raise CaptureError(source, f"line {line_no} has {len(fields)} field(s)",
                               expected=f"{n} like the lines before")
        row = []
        for j, field in enumerate(fields):
            value = _number(field)
            if value is None:
                shown = field if len(field) <= 40 else field[:37] + "..."
                raise CaptureError(source, f"line {line_no}, column {layout.names[j]!r} is "
                                   f"{shown!r}", expected="a number")
            row.append(value)
        numbers.append(row)
        rows.append(line_no)
    return np.array(numbers, dtype=np.float64).reshape(-1, n), np.array(rows, dtype=np.int64)


class _Store:
    """Parsed samples (float32, rows by channels), in memory or in a temporary file."""

    def __init__(self, n_channels: int):
        self.n_channels, self.n_rows = n_channels, 0
        self._parts: list[np.ndarray] = []
        self._file: IO[bytes] | None = None

    def append(self, x: np.ndarray) -> None:
        x = np.ascontiguousarray(x, dtype=np.float32)
        if self._file is None and (self.n_rows + x.shape[0]) * self.n_channels * 4 > SPILL_BYTES:
            # unnamed, so it goes with the last reference to the capture
            self._file = tempfile.TemporaryFile(prefix="okdecode-trace-")  # noqa: SIM115
            for part in self._parts:
                self._file.write(part.tobytes())
            self._parts = []
        if self._file is not None:
            self._file.write(x.tobytes())
        else:
            self._parts.append(x)
        self.n_rows += x.shape[0]

    def reader(self):
        c = self.n_channels
        if self._file is None:
            data = np.concatenate(self._parts) if self._parts else np.empty((0, c), np.float32)
            self._parts = []

            def from_memory(block_len: int) -> Iterator[np.ndarray]:
                for start in range(0, data.shape[0], block_len):
                    yield data[start : start + block_len]

            return from_memory
        f = self._file
        f.flush()
        n_rows = self.n_rows

        def from_file(block_len: int) -> Iterator[np.ndarray]:
            for start in range(0, n_rows, block_len):
                count = min(block_len, n_rows - start)
                raw = os.pread(f.fileno(), count * c * 4, start * c * 4)
                yield np.frombuffer(raw, dtype=np.float32).reshape(count, c)

        return from_file


@dataclass
class _TimeStats:
    """Running statistics of the time column, in seconds."""

    first: float | None = None
    last: float | None = None
    n: int = 0
    n_repeats: int = 0
    min_step: float = math.inf  # smallest positive step
    max_step: float = 0.0

    def add(self, t: np.ndarray, lines: np.ndarray | int, *, source: str, name: str) -> None:
        if t.size == 0:
            return
        steps = np.diff(t, prepend=t[0] if self.last is None else self.last)
        if self.last is None:
            steps = steps[1:]
            offset = 1
        else:
            offset = 0
        back = np.flatnonzero(steps < 0)
        if back.size:
            i = int(back[0]) + offset
            line = int(lines[i]) if isinstance(lines, np.ndarray) else lines + i
            raise CaptureError(source, f"line {line}: time goes backwards in column {name!r} "
                               f"(from {t[i - 1] if i else self.last:.9g} to {t[i]:.9g})",
                               expected="time stamps that never decrease")
        self.n_repeats += int(np.count_nonzero(steps == 0))
        pos = steps[steps > 0]
        if pos.size:
            self.min_step = min(self.min_step, float(pos.min()))
            self.max_step = max(self.max_step, float(pos.max()))
        if self.first is None:
            self.first = float(t[0])
        self.last = float(t[-1])
        self.n += t.size


def read_trace(file: str | PathLike | IO, *, source: str | None = None,
               rate_hz: float | None = None, columns: object = None) -> Capture:
    """Parse a trace (CSV or text) into a capture of its signal columns.

    Parameters
    ----------
    file : str, PathLike or file object
        The trace; a text or binary stream is read to its end.
    source : str, optional
        Name used in messages; default: the path, or ``"<stream>"``.
    rate_hz : float, optional
        Sample rate, Hz; needed when the trace has neither a time column nor a
        sample-interval line, and preferred to them when given.
    columns : int, str or sequence of them, optional
        The columns read as channels: header names (case does not matter, nor a unit in
        brackets), or indices among the signal columns (0 is the first column that is not
        time or a sample index). Default: every signal column.

    Returns
    -------
    Capture
        ``kind="trace"``, real float32 samples as written (volts, codes, ...), one channel
        per selected column. Its notes say how the layout was read and where the rate came
        from, and whether the time stamps repeat or are not uniform.

    Raises
    ------
    CaptureError
        If the text has no rows of numbers, a row is not numbers (its line, column and
        content are named), there is a single row, time goes backwards, or no rate is
        found.
    ParameterError
        If ``columns`` names columns the trace does not have, or ``rate_hz`` is absurd.
    """
    if isinstance(file, (str, PathLike)):
        src = str(file) if source is None else source
        try:
            f: IO[bytes] = open(file, "rb")  # noqa: SIM115 - closed below
        except OSError as err:
            raise CaptureError(src, f"cannot be read ({err.strerror})") from err
    else:
        src = "<stream>" if source is None else source
        data = file.read()
        if isinstance(data, str):
            data = data.encode("utf-8", errors="surrogatepass")
        f = io.BytesIO(data)
    with f:
        return _read(f, src, rate_hz=rate_hz, columns=columns)


def _read(f: IO[bytes], source: str, *, rate_hz: float | None, columns: object) -> Capture:
    if rate_hz is not None:
        rate_hz = check_rate(rate_hz, source)
    head = f.read(HEAD_BYTES)
    at_eof = len(head) < HEAD_BYTES
    if head.startswith((b"\xff\xfe", b"\xfe\xff")):  # UTF-16 with its byte-order mark
        data = head + f.read()
        try:
            text = data.decode("utf-16")
        except UnicodeDecodeError as err:
            raise CaptureError(source, "UTF-16 text that cannot be decoded") from err
        f = io.BytesIO(text.encode("utf-8"))
        head = f.read(HEAD_BYTES)
        at_eof = len(head) < HEAD_BYTES
    bom = 3 if head.startswith(b"\xef\xbb\xbf") else 0
    if not looks_like_text(head[:4096]):
        raise CaptureError(source, "not a text file", expected="a trace: CSV or text")
    if b"\n" not in head and b"\r" in head:  # old line ends: carriage returns alone
        data = (head + f.read()).replace(b"\r", b"\n")
        f = io.BytesIO(data)
        head = f.read(HEAD_BYTES)
        at_eof = len(head) < HEAD_BYTES
    layout = sniff(head[bom:], at_eof=at_eof, source=source)
    time_col, index_cols = _time_column(layout, head[bom:], source)
    signal = [j for j in range(layout.n_fields) if j != time_col and j not in index_cols]
    if not signal:
        raise CaptureError(source, "no signal column beside the time column",
                           expected="a column of samples")
    chosen = _choose(signal, layout, columns, source)
    time_scale = None
    if time_col is not None:
        time_scale = _time_scale(layout.names[time_col], layout.units[time_col], source) or 1.0
    store = _Store(len(chosen))
    stats = _TimeStats()
    time_name = layout.names[time_col] if time_col is not None else ""
    f.seek(bom + layout.data_offset)
    for chunk, first_line, n_lines in _Chunks(f, layout.data_line):
        values = _fast_parse(chunk, layout, n_lines) if layout.fast else None
        lines: np.ndarray | int = first_line
        if values is None:
            values, lines = _parse_lines(chunk, layout, first_line, source=source)
        if values.dtype.kind == "f":
            _check_values(values, lines, layout, source)
        if time_col is not None:
            stats.add(values[:, time_col] * float(time_scale), lines, source=source,
                      name=time_name)
        store.append(values[:, chosen])
    n_rows = store.n_rows
    if n_rows < 2:
        raise CaptureError(source, f"{'only one data row' if n_rows else 'no data rows'} "
                           f"(line {layout.data_line})", expected="at least two samples")
    notes = [_describe(layout, n_rows)]
    if time_col is not None and layout.header_line is None:
        notes.append("no header: the first column rises through the first rows, so it is "
                     "taken as time in seconds")
    rate = _rate(layout, time_col, stats, rate_hz, notes, source)
    return Capture(source=source, rate_hz=rate, n_samples=n_rows, n_channels=len(chosen),
                   is_complex=False, kind="trace", reader=store.reader(),
                   channel_names=tuple(layout.names[j] for j in chosen), notes=tuple(notes),
                   metadata={"layout": layout})


def _check_values(values: np.ndarray, lines: np.ndarray | int, layout: Layout,
                  source: str) -> None:
    """CaptureError at the first value that is not finite or does not fit a float32."""
    bad = ~(np.abs(values) <= np.finfo(np.float32).max)  # NaN fails too
    if bad.any():
        i, j = (int(v) for v in np.argwhere(bad)[0])
        line = int(lines[i]) if isinstance(lines, np.ndarray) else lines + i
        what = "not finite" if not np.isfinite(values[i, j]) else "too large"
        raise CaptureError(source, f"line {line}, column {layout.names[j]!r} is {what} "
                           f"({values[i, j]:g})", expected="finite samples")


def _time_column(layout: Layout, head: bytes, source: str) -> tuple[int | None, set[int]]:
    """The index of the time column (or None) and of sample-index columns."""
    index_cols = {j for j, name in enumerate(layout.names)
                  if layout.header_line is not None and _INDEX_NAME.match(name.strip())}
    if layout.header_line is not None:
        for j, (name, unit) in enumerate(zip(layout.names, layout.units, strict=True)):
            if j not in index_cols and _time_scale(name, unit, source) is not None:
                return j, index_cols
        return None, index_cols
    if layout.n_fields < 2:
        return None, index_cols
    # no header: a first column that rises through the first lines is time, in seconds
    sample = []
    for raw in head[layout.data_offset:].split(b"\n")[:-1][:64]:
        fields = _line_fields(raw.decode("utf-8", errors="replace").rstrip("\r"), layout.sep)
        if not fields or len(fields) != layout.n_fields:
            break
        value = _number(fields[0])
        if value is None:
            break
        sample.append(value)
    rising = all(b >= a for a, b in zip(sample, sample[1:], strict=False))
    if len(sample) >= 3 and rising and sample[-1] > sample[0]:
        return 0, index_cols
    return None, index_cols


def _choose(signal: list[int], layout: Layout, columns: object, source: str) -> list[int]:
    if columns is None:
        return signal
    wanted = [columns] if isinstance(columns, (str, int, np.integer)) else list(columns)  # type: ignore[arg-type]
    if not wanted:
        raise ParameterError(source, "no columns chosen", expected="a column name or index")
    names = [layout.names[j] for j in signal]
    bare = [re.sub(r"\s*[(\[{].*$", "", n).strip().lower() for n in names]
    out = []
    for w in wanted:
        if isinstance(w, bool):
            raise ParameterError(source, f"column {w!r}", expected="a name or an index")
        if isinstance(w, (int, np.integer)):
            if not 0 <= int(w) < len(signal):
                raise ParameterError(source, f"column index {int(w)} does not exist",
                                     expected=f"0 to {len(signal) - 1} (signal columns: "
                                     f"{', '.join(map(repr, names))})")
            out.append(signal[int(w)])
            continue
        key = str(w).strip().lower()
        hits = [j for j, (n, b) in enumerate(zip(names, bare, strict=True))
                if key in (n.lower(), b)]
        if not hits:
            raise ParameterError(source, f"no column named {str(w)!r}",
                                 expected="one of " + ", ".join(map(repr, names)))
        out.append(signal[hits[0]])
    return out


def _describe(layout: Layout, n_rows: int) -> str:
    sep = {",": "commas", ";": "semicolons", "\t": "tabs", " ": "blanks"}[layout.sep]
    parts = [f"trace: {n_rows} rows of {layout.n_fields} field(s) separated by {sep}"]
    if layout.decimal_comma:
        parts.append("decimal commas")
    if layout.quoted:
        parts.append("quoted")
    if layout.header_line is not None:
        parts.append(f"header at line {layout.header_line}")
    if layout.metadata:
        parts.append(f"{len(layout.metadata)} metadata line(s)")
    return ", ".join(parts)


def _rate(layout: Layout, time_col: int | None, stats: _TimeStats, rate_hz: float | None,
          notes: list[str], source: str) -> float:
    """The sample rate from the option, the time column or the metadata; notes say which."""
    from_time = None
    if time_col is not None:
        name = layout.names[time_col]
        assert stats.first is not None and stats.last is not None
        span = stats.last - stats.first
        if span <= 0:
            raise CaptureError(source, f"the time column {name!r} does not advance",
                               expected="rising time stamps")
        dt = span / (stats.n - 1)
        from_time = 1.0 / dt
        if stats.n_repeats:
            notes.append(f"{stats.n_repeats} time stamps repeat the one before (the export "
                         "rounds time); the rate comes from the first and the last")
        if stats.max_step > 1.5 * dt or (not stats.n_repeats and stats.min_step < 0.5 * dt):
            notes.append(f"time steps are not uniform: from {stats.min_step:.4g} s to "
                         f"{stats.max_step:.4g} s around the mean {dt:.4g} s; the samples "
                         "are taken as evenly spaced")
    from_meta = _metadata_rate(layout.metadata, layout.sep)
    if rate_hz is not None:
        notes.append(f"sample rate {rate_hz:g} Hz as given")
        for found, where in ((from_time, "the time column"),
                             (from_meta[0] if from_meta else None, "the metadata")):
            if found is not None and abs(found / rate_hz - 1) > 0.01:
                notes.append(f"{where} says {found:.6g} Hz")
        return rate_hz
    if from_time is not None:
        rate = from_time
        notes.append(f"sample rate {rate:.6g} Hz from the time column {layout.names[time_col]!r}")
        if from_meta is not None and abs(from_meta[0] / rate - 1) > 0.01:
            notes.append(f"the metadata says {from_meta[0]:.6g} Hz ({from_meta[1]!r})")
    elif from_meta is not None:
        rate = from_meta[0]
        notes.append(f"sample rate {rate:.6g} Hz from the metadata line {from_meta[1]!r}")
    else:
        raise CaptureError(source, "the trace has no time column and no sample-interval "
                           "line; pass --rate HZ")
    if not (math.isfinite(rate) and 0 < rate <= 1e11):
        raise CaptureError(source, f"the time stamps give a sample rate of {rate:g} Hz",
                           expected="a rate > 0 and at most 1e11 Hz")
    return rate

