"""Range-test campaigns: many recordings decoded in parallel into a resumable results store.

A campaign is a folder of recordings (searched recursively) or a manifest CSV that lists
them. :func:`run` decodes each one (and verifies it against its expected text when the
manifest gives one) in worker processes, or on a Dask cluster when a scheduler address is
given, and the parent process alone writes each result to ``DIR/results.sqlite`` in its own
transaction as it arrives. The store keeps one row per recording content and settings
(see ``docs/store.md``), so a re-run skips what is stored and a run killed at any moment
loses at most the recordings in flight. At the end the rows of the run are exported to
``DIR/results.csv`` and ``DIR/results.json`` and drawn in ``DIR/report.html``
(:mod:`okdecode.campaign`).

Built on the stages (:func:`okdecode.receiver.decode_capture`); no stage imports it.
"""

from __future__ import annotations

import csv
import hashlib
import importlib.util
import json
import math
import os
import sqlite3
import sys
import time
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field, replace
from datetime import datetime, timezone
from pathlib import Path

from . import __version__
from .errors import OkDecodeError, ParameterError

__all__ = [
    "SUFFIXES",
    "SCHEMA_VERSION",
    "Job",
    "Outcome",
    "Store",
    "Summary",
    "discover",
    "process",
    "read_manifest",
    "run",
]

#: Name endings of the recordings a folder search collects (a ``.sigmf-data`` file is read
#: through its ``.sigmf-meta``).
SUFFIXES = (".wav", ".flac", ".ogg", ".sigmf-meta", ".sigmf", ".cu8", ".cs8", ".cs16",
            ".cf32", ".iq", ".csv", ".txt", ".npy")

#: Version of the store's layout, kept in its ``store_info`` table.
SCHEMA_VERSION = 1

STORE_NAME = "results.sqlite"

#: Manifest columns read as reader options (passed to :func:`okdecode.capture.open_capture`).
READER_COLUMNS = {"rate_hz": float, "iq_format": str, "center_hz": float}
#: Manifest columns read as decode options (passed to the receiver).
DECODE_COLUMNS = {"carrier_hz": float, "channel": int, "wpm": float, "decoder": str}
#: Manifest columns with a meaning of their own; every other column is metadata.
KNOWN_COLUMNS = {"file", "expect", "distance_m", *READER_COLUMNS, *DECODE_COLUMNS}

_TIMING_KEYS = ("dot_ms", "dash_ms", "dot_spread_ms", "dash_spread_ms", "dash_dot_ratio",
                "element_gap_ms", "char_gap_ms", "word_gap_ms", "jitter_ms", "unit_ms")
_DECODE_KEYS = ("text", "carrier_hz", "wpm", "farnsworth_wpm", "cn0_dbhz", "snr_db",
                "snr_bandwidth_hz", "signal_dbfs", "noise_dbfs", "duration_s", "channel",
                "rate_hz", "decoder", "n_unknown")

#: The store's columns and their SQL types, in order (documented in docs/store.md).
COLUMNS: tuple[tuple[str, str], ...] = (
    ("content_hash", "TEXT NOT NULL"),
    ("settings_hash", "TEXT NOT NULL"),
    ("file", "TEXT NOT NULL"),
    ("path", "TEXT NOT NULL"),
    ("distance_m", "REAL"),
    ("status", "TEXT NOT NULL CHECK (status IN ('ok', 'failed'))"),
    ("error", "TEXT"),
    ("text", "TEXT"),
    ("carrier_hz", "REAL"),
    ("wpm", "REAL"),
    ("farnsworth_wpm", "REAL"),
    ("cn0_dbhz", "REAL"),
    ("snr_db", "REAL"),
    ("snr_bandwidth_hz", "REAL"),
    ("signal_dbfs", "REAL"),
    ("noise_dbfs", "REAL"),
    ("duration_s", "REAL"),
    ("channel", "INTEGER"),
    ("rate_hz", "REAL"),
    ("decoder", "TEXT"),
    ("n_unknown", "INTEGER"),
    ("n_characters", "INTEGER"),
    *((k, "REAL") for k in _TIMING_KEYS),
    ("warnings", "TEXT"),
    ("expected", "TEXT"),
    ("received", "INTEGER"),
    ("cer", "REAL"),
    ("copies", "INTEGER"),
    ("detected", "INTEGER"),
    ("verification", "TEXT"),
    ("decode", "TEXT"),
    ("metadata", "TEXT"),
    ("capture_metadata", "TEXT"),
    ("settings", "TEXT"),
    ("figure", "TEXT"),
    ("okdecode_version", "TEXT NOT NULL"),
    ("elapsed_s", "REAL"),
    ("stored_utc", "TEXT NOT NULL"),
)
COLUMN_NAMES = tuple(name for name, _ in COLUMNS)
#: Columns that change from run to run by nature (a clock), left out of comparisons.
VOLATILE_COLUMNS = ("elapsed_s", "stored_utc")


@dataclass(frozen=True)
class Job:
    """One recording of a campaign and the settings it is decoded with."""

    path: str  # absolute path of the recording
    file: str  # its name relative to the campaign folder, as shown and stored
    distance_m: float | None = None
    expect: str | None = None  # the message sent, if known
    reader_options: dict = field(default_factory=dict)  # rate_hz, iq_format, center_hz
    decode_options: dict = field(default_factory=dict)  # carrier_hz, channel, wpm
    metadata: dict = field(default_factory=dict)  # the manifest's other columns
    max_cer: float = 0.0  # largest character error rate still counted as received

    def settings(self) -> dict:
        """What the result depends on besides the recording's content."""
        return {"reader": dict(sorted(self.reader_options.items())),
                "decode": dict(sorted(self.decode_options.items())),
                "expect": self.expect, "max_cer": self.max_cer}

    def settings_hash(self) -> str:
        """SHA-256 of :meth:`settings` as canonical JSON, hex."""
        text = json.dumps(self.settings(), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(text.encode()).hexdigest()


@dataclass(frozen=True)
class Outcome:
    """What a worker sends back for one job: plain data, cheap to pickle."""

    content_hash: str
    settings_hash: str
    status: str  # "ok" or "failed"
    error: str | None
    decode: dict | None  # Reception.to_dict()
    verification: dict | None
    capture_metadata: dict
    figure: str | None  # path of the recording's figure relative to the output folder
    warnings: tuple[str, ...]  # the decode's warnings and any trouble with the figure
    elapsed_s: float


@dataclass(frozen=True)
class Summary:
    """What a batch run did."""

    out: str  # the output folder
    n_recordings: int  # distinct recordings and settings in this run
    n_processed: int  # decoded in this run
    n_skipped: int  # found in the store already
    n_failed: int  # rows of this run whose status is "failed"
    n_received: int | None  # verified received; None when no recording has an expected text
    store: str
    report: str | None
    exports: tuple[str, ...]
    keys: tuple[tuple[str, str], ...] = field(repr=False, default=())

    @property
    def exit_status(self) -> int:
        """0 when every recording was processed, 1 when some failed."""
        return 1 if self.n_failed else 0

    def to_dict(self) -> dict:
        return {"out": self.out, "n_recordings": self.n_recordings,
                "n_processed": self.n_processed, "n_skipped": self.n_skipped,
                "n_failed": self.n_failed, "n_received": self.n_received,
                "store": self.store, "report": self.report, "exports": list(self.exports)}


# --- finding the recordings ---------------------------------------------------------------


def _is_recording(name: str) -> bool:
    low = name.lower()
    return low.endswith(SUFFIXES)


def _looks_like_manifest(path: Path) -> bool:
    """A CSV whose header has a ``file`` column lists recordings; it is not a trace."""
    try:
        with open(path, newline="", encoding="utf-8-sig") as f:
            header = next(csv.reader(f), [])
    except (OSError, UnicodeDecodeError, csv.Error):
        return False
    return "file" in (h.strip() for h in header)


def discover(folder: str | os.PathLike, *, exclude: Iterable[str | os.PathLike] = ()
             ) -> list[Job]:
    """Every recording under a folder, searched recursively, sorted by name.

    Parameters
    ----------
    folder : str or PathLike
        The campaign folder.
    exclude : iterable of paths
        Folders left out (the output folder, when it lies inside).

    Returns
    -------
    list of Job
        One per file whose name ends in one of :data:`SUFFIXES`. Hidden files and folders,
        ``.sigmf-data`` files (read through their ``.sigmf-meta``) and CSV files whose
        header has a ``file`` column (manifests) are left out.

    Raises
    ------
    ParameterError
        If the folder does not exist.
    """
    root = Path(folder)
    if not root.is_dir():
        raise ParameterError(folder, "no such folder", expected="a folder of recordings or "
                             "a manifest CSV")
    root = root.resolve()
    skip = {Path(p).resolve() for p in exclude}
    jobs = []
    for here, dirs, files in os.walk(root):
        dirs[:] = sorted(d for d in dirs
                         if not d.startswith(".") and (Path(here) / d).resolve() not in skip)
        for name in sorted(files):
            p = Path(here) / name
            if name.startswith(".") or not _is_recording(name):
                continue
            if name.lower().endswith(".csv") and _looks_like_manifest(p):
                continue
            jobs.append(Job(path=str(p), file=p.relative_to(root).as_posix()))
    return sorted(jobs, key=lambda j: j.file)


def _cell(manifest: str, line: int, column: str, value: str, kind: type):
    try:
        v = kind(value)
    except ValueError:
        v = None
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        raise ParameterError(manifest, f"line {line}, column {column!r} is {value!r}",
                             expected="an integer" if kind is int else "a finite number")
    return v


def read_manifest(manifest: str | os.PathLike, *, max_cer: float = 0.0) -> list[Job]:
    """The recordings a manifest CSV lists, with their settings and metadata.

    Parameters
    ----------
    manifest : str or PathLike
        A CSV file (UTF-8, header row) with a ``file`` column, relative to the manifest's
        folder, and optional columns ``expect`` (the message sent), ``distance_m``,
        reader options ``rate_hz``, ``iq_format``, ``center_hz`` and decode options
        ``carrier_hz``, ``channel``, ``wpm``. Empty cells mean "not given". Every other
        column is kept as the recording's metadata.
    max_cer : float
        Largest character error rate counted as received.

    Returns
    -------
    list of Job
        In the manifest's order.

    Raises
    ------
    ParameterError
        If the manifest cannot be read, has no ``file`` column, a number cell is not a
        number, or a path is absolute or leads outside the manifest's folder (after
        following symbolic links): such a manifest is refused as a whole.
    """
    src = str(manifest)
    mpath = Path(manifest)
    try:
        with open(mpath, newline="", encoding="utf-8-sig") as f:
            rows = list(csv.DictReader(f))
    except FileNotFoundError as err:
        raise ParameterError(src, "no such manifest", expected="a CSV file") from err
    except (OSError, UnicodeDecodeError, csv.Error) as err:
        raise ParameterError(src, f"cannot be read as CSV ({err})",
                             expected="a UTF-8 CSV with a 'file' column") from err
    fields = list(rows[0].keys()) if rows else []
    if not rows:
        raise ParameterError(src, "lists no recordings", expected="a header and one row per "
                             "recording")
    names = [(k or "").strip() for k in fields]
    if "file" not in names:
        raise ParameterError(src, f"has no 'file' column (columns: {', '.join(names)})",
                             expected="a 'file' column of paths relative to the manifest")
    root = mpath.parent.resolve()
    jobs = []
    for line, raw in enumerate(rows, start=2):
        row = {(k or "").strip(): (v or "").strip() if isinstance(v, str) else ""
               for k, v in raw.items()}
        name = row.get("file", "")
        if not name:
            raise ParameterError(src, f"line {line}: empty 'file' cell", expected="a path")
        rel = Path(name)
        target = (root / rel).resolve()
        if rel.is_absolute() or not target.is_relative_to(root):
            raise ParameterError(src, f"line {line}: file {name!r} lies outside the "
                                 "manifest's folder", expected="a path inside "
                                 f"{mpath.parent.as_posix() or '.'}")
        reader = {k: _cell(src, line, k, row[k], t) if t is not str else row[k]
                  for k, t in READER_COLUMNS.items() if row.get(k)}
        decode = {k: _cell(src, line, k, row[k], t) if t is not str else row[k]
                  for k, t in DECODE_COLUMNS.items() if row.get(k)}
        distance = (_cell(src, line, "distance_m", row["distance_m"], float)
                    if row.get("distance_m") else None)
        expect = row.get("expect") or None
        meta = {k: v for k, v in row.items() if k not in KNOWN_COLUMNS and k}
        jobs.append(Job(path=str(target), file=rel.as_posix(), distance_m=distance,
                        expect=expect, reader_options=reader, decode_options=decode,
                        metadata=meta, max_cer=max_cer))
    return jobs


def content_hash(path: str | os.PathLike) -> str:
    """SHA-256 of a recording's bytes (with its ``.sigmf-data`` for a ``.sigmf-meta``), hex.

    Raises
    ------
    OSError
        If a file cannot be read.
    """
    p = Path(path)
    parts = [p]
    if p.name.lower().endswith(".sigmf-meta"):
        data = p.with_name(p.name[: -len(".sigmf-meta")] + ".sigmf-data")
        if data.exists():
            parts.append(data)
    h = hashlib.sha256()
    for part in parts:
        with open(part, "rb") as f:
            while chunk := f.read(1 << 20):
                h.update(chunk)
    return h.hexdigest()


# --- verification ---------------------------------------------------------------------------


def _verify(reception, job: Job, capture) -> dict:
    """okdecode.verify's comparison and known-message detection, as a dict."""
    from . import verify

    return verify.verify_reception(
        reception, job.expect, max_cer=job.max_cer, capture=capture,
        carrier_hz=job.decode_options.get("carrier_hz"),
        channel=job.decode_options.get("channel")).to_dict()


# --- the work of one recording --------------------------------------------------------------


def _error_line(job: Job, err: BaseException) -> str:
    """One line that starts with the recording's name as the campaign knows it."""
    if not isinstance(err, OkDecodeError):
        return f"{job.file}: unexpected {type(err).__name__} ({err}); please report this"
    line = str(err)
    # the readers name the absolute path they were given; the campaign's name is shorter
    return job.file + line[len(job.path):] if line.startswith(job.path + ":") else line


def _jsonable(value):
    return json.loads(json.dumps(value, default=str))


def process(job: Job, content_hash: str, figure_path: str | None = None,
            out_dir: str | None = None) -> Outcome:
    """Decode (and verify) one recording; every failure becomes an Outcome, never raised.

    Runs in a worker process (or on a Dask worker): it writes nothing but the figure.

    Parameters
    ----------
    job : Job
        The recording and its settings.
    content_hash : str
        Its content hash, as the parent computed it (the row's key).
    figure_path : str, optional
        Where to write the recording's figure, relative to ``out_dir``, through
        ``okdecode.plot.write_figure`` when that module exists.
    out_dir : str, optional
        The output folder.
    """
    from .capture import open_capture
    from .receiver import decode_capture

    t0 = time.perf_counter()
    key = (content_hash, job.settings_hash())
    try:
        capture = open_capture(job.path, **job.reader_options)
        reception = decode_capture(capture, **job.decode_options)
        decoded = reception.to_dict()
        verification = (_verify(reception, job, capture)
                        if job.expect is not None else None)
    except Exception as err:  # noqa: BLE001 - the campaign goes on; the error is stored
        return Outcome(*key, status="failed", error=_error_line(job, err), decode=None,
                       verification=None, capture_metadata={}, figure=None, warnings=(),
                       elapsed_s=time.perf_counter() - t0)
    warnings = list(reception.warnings)
    figure = None
    if figure_path is not None and out_dir is not None:
        try:
            from .plot import write_figure

            target = Path(out_dir) / figure_path
            target.parent.mkdir(parents=True, exist_ok=True)
            write_figure(reception, str(target))
            figure = figure_path
        except Exception as err:  # noqa: BLE001 - a figure is a nicety; the decode stands
            warnings.append(f"figure not written: {_error_line(job, err)}")
    return Outcome(*key, status="ok", error=None, decode=_jsonable(decoded),
                   verification=None if verification is None else _jsonable(verification),
                   capture_metadata=_jsonable(dict(capture.metadata)), figure=figure,
                   warnings=tuple(warnings), elapsed_s=time.perf_counter() - t0)


# --- the store ------------------------------------------------------------------------------


def _utc_now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="milliseconds")


class Store:
    """``results.sqlite``: one row per (content hash, settings hash); see docs/store.md.

    SQLite in WAL mode with full synchronisation: each :meth:`put` is its own
    transaction, so a process killed at any moment leaves every committed row intact
    and no partial one. Only the parent process of a batch writes to it.

    Raises
    ------
    ParameterError
        If the file exists and is not an okdecode results store of this layout.
    """

    def __init__(self, path: str | os.PathLike):
        self.path = str(path)
        try:
            self._conn = sqlite3.connect(self.path, timeout=30.0)
            mode = self._conn.execute("PRAGMA journal_mode=WAL").fetchone()[0]
            self._conn.execute("PRAGMA synchronous=FULL")
            with self._conn:
                self._conn.execute("CREATE TABLE IF NOT EXISTS store_info "
                                   "(key TEXT PRIMARY KEY, value TEXT NOT NULL)")
                cols = ",\n  ".join(f"{n} {t}" for n, t in COLUMNS)
                self._conn.execute(f"CREATE TABLE IF NOT EXISTS results (\n  {cols},\n"
                                   "  PRIMARY KEY (content_hash, settings_hash))")
                self._conn.execute("INSERT OR IGNORE INTO store_info VALUES "
                                   "('schema_version', ?)", (str(SCHEMA_VERSION),))
            version = self._conn.execute("SELECT value FROM store_info WHERE key = "
                                         "'schema_version'").fetchone()[0]
            have = [r[1] for r in self._conn.execute("PRAGMA table_info(results)")]
        except sqlite3.Error as err:
            raise ParameterError(self.path, f"cannot be used as a results store ({err})",
                                 expected="an okdecode results.sqlite") from err
        if str(version) != str(SCHEMA_VERSION) or tuple(have) != COLUMN_NAMES:
            self._conn.close()
            raise ParameterError(self.path, f"store layout {version} with other columns",
                                 expected=f"layout {SCHEMA_VERSION} (docs/store.md); "
                                 "use another --out folder")
        if str(mode).lower() != "wal":  # pragma: no cover - file systems without WAL
            raise ParameterError(self.path, f"journal mode {mode!r}", expected="WAL")

    def close(self) -> None:
        self._conn.close()

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def status(self, key: tuple[str, str]) -> str | None:
        """The stored status of a key, or None when it has no row."""
        row = self._conn.execute("SELECT status FROM results WHERE content_hash = ? AND "
                                 "settings_hash = ?", key).fetchone()
        return None if row is None else row[0]

    def put(self, job: Job, outcome: Outcome) -> None:
        """Write one result in its own transaction (replacing an earlier row of its key)."""
        d = outcome.decode or {}
        v = outcome.verification
        timing = d.get("timing") or {}
        row = {
            "content_hash": outcome.content_hash, "settings_hash": outcome.settings_hash,
            "file": job.file, "path": job.path, "distance_m": job.distance_m,
            "status": outcome.status, "error": outcome.error,
            **{k: d.get(k) for k in _DECODE_KEYS},
            "n_characters": len(d["characters"]) if "characters" in d else None,
            **{k: timing.get(k) for k in _TIMING_KEYS},
            "warnings": json.dumps(list(outcome.warnings), ensure_ascii=False),
            "expected": job.expect,
            "received": None if v is None else int(bool(v.get("received"))),
            "cer": None if v is None else v.get("cer"),
            "copies": None if v is None else v.get("copies"),
            "detected": _detected(v),
            "verification": None if v is None else _dumps(v),
            "decode": None if outcome.decode is None else _dumps(outcome.decode),
            "metadata": _dumps(job.metadata),
            "capture_metadata": _dumps(outcome.capture_metadata),
            "settings": _dumps(job.settings()),
            "figure": outcome.figure, "okdecode_version": __version__,
            "elapsed_s": outcome.elapsed_s, "stored_utc": _utc_now(),
        }
        marks = ", ".join("?" for _ in COLUMN_NAMES)
        with self._conn:
            self._conn.execute(f"INSERT OR REPLACE INTO results ({', '.join(COLUMN_NAMES)}) "
                               f"VALUES ({marks})", [row[c] for c in COLUMN_NAMES])

    def refresh(self, job: Job, key: tuple[str, str]) -> None:
        """Bring a stored row's name, distance and metadata up to date with the input."""
        with self._conn:
            self._conn.execute("UPDATE results SET file = ?, path = ?, distance_m = ?, "
                               "metadata = ? WHERE content_hash = ? AND settings_hash = ? "
                               "AND (file IS NOT ? OR path IS NOT ? OR distance_m IS NOT ? "
                               "OR metadata IS NOT ?)",
                               (job.file, job.path, job.distance_m, _dumps(job.metadata),
                                *key, job.file, job.path, job.distance_m,
                                _dumps(job.metadata)))

    def rows(self, keys: Iterable[tuple[str, str]] | None = None) -> list[dict]:
        """Stored rows as dicts (JSON columns parsed), sorted by distance then file."""
        cur = self._conn.execute(f"SELECT {', '.join(COLUMN_NAMES)} FROM results")
        wanted = None if keys is None else set(keys)
        out = []
        for values in cur:
            row = dict(zip(COLUMN_NAMES, values, strict=True))
            if wanted is None or (row["content_hash"], row["settings_hash"]) in wanted:
                out.append(_parsed(row))
        return sorted(out, key=_row_order)

    def row(self, key: tuple[str, str]) -> dict | None:
        """One stored row as a dict, or None."""
        values = self._conn.execute(f"SELECT {', '.join(COLUMN_NAMES)} FROM results WHERE "
                                    "content_hash = ? AND settings_hash = ?", key).fetchone()
        return None if values is None else _parsed(dict(zip(COLUMN_NAMES, values,
                                                            strict=True)))


def _parsed(row: dict) -> dict:
    for k in ("warnings", "verification", "decode", "metadata", "capture_metadata",
              "settings"):
        if row[k] is not None:
            row[k] = json.loads(row[k])
    for k in ("received", "detected"):
        if row[k] is not None:
            row[k] = bool(row[k])
    return row


def _row_order(row: dict):
    d = row["distance_m"]
    return (d is None, d if d is not None else 0.0, row["file"], row["settings_hash"])


def _dumps(value) -> str:
    return json.dumps(value, ensure_ascii=False, sort_keys=True, default=str)


def _detected(v: dict | None) -> int | None:
    det = (v or {}).get("detection")
    if not isinstance(det, dict) or det.get("detected") is None:
        return None
    return int(bool(det["detected"]))


# --- exports --------------------------------------------------------------------------------

_CSV_SKIP = ("decode", "verification", "capture_metadata", "settings", "metadata")


def write_exports(rows: list[dict], out: Path) -> tuple[str, str]:
    """``results.csv`` (one flat row per recording, metadata columns appended) and
    ``results.json`` (the rows with their decode and verification objects).
    """
    meta_keys = sorted({k for r in rows for k in (r["metadata"] or {})})
    base = [c for c in COLUMN_NAMES if c not in _CSV_SKIP]
    header = base + [k if k not in base else f"meta_{k}" for k in meta_keys]
    csv_path, json_path = out / "results.csv", out / "results.json"
    tmp = csv_path.with_suffix(".csv.tmp")
    with open(tmp, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(header)
        for r in rows:
            vals = [_csv_value(r[c]) for c in base]
            vals += [(r["metadata"] or {}).get(k, "") for k in meta_keys]
            w.writerow(vals)
    os.replace(tmp, csv_path)
    tmp = json_path.with_suffix(".json.tmp")
    with open(tmp, "w", encoding="utf-8") as f:
        json.dump(rows, f, ensure_ascii=False, indent=1, sort_keys=True)
        f.write("\n")
    os.replace(tmp, json_path)
    return str(csv_path), str(json_path)


def _csv_value(v) -> str:
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (list, dict)):
        return json.dumps(v, ensure_ascii=False)
    return str(v)


# --- running --------------------------------------------------------------------------------


class _Bar:
    """A progress bar on stderr when it is a terminal; silent otherwise."""

    def __init__(self, total: int, *, enabled: bool | None = None):
        self.total, self.done = total, 0
        self.enabled = (sys.stderr.isatty() if enabled is None else enabled) and total > 0

    def step(self, name: str) -> None:
        self.done += 1
        if self.enabled:
            width = 24
            fill = round(width * self.done / self.total)
            tail = name if len(name) <= 40 else "..." + name[-37:]
            sys.stderr.write(f"\r\x1b[Kbatch [{'#' * fill}{'.' * (width - fill)}] "
                             f"{self.done}/{self.total} {tail}")
            sys.stderr.flush()

    def close(self) -> None:
        if self.enabled:
            sys.stderr.write("\r\x1b[K")
            sys.stderr.flush()


def load_jobs(source: str | os.PathLike, *, out: str | os.PathLike | None = None,
              max_cer: float = 0.0, decoder: str | None = None) -> list[Job]:
    """The jobs of an input: a manifest CSV file or a folder searched recursively.

    ``decoder`` is the decision method of every job whose manifest row names none.

    Raises
    ------
    ParameterError
        If the input is missing, lists nothing, or is a manifest that :func:`read_manifest`
        refuses.
    """
    p = Path(source)
    if p.is_dir():
        jobs = discover(p, exclude=[out] if out is not None else [])
        jobs = [Job(path=j.path, file=j.file, max_cer=max_cer) for j in jobs]
        if not jobs:
            raise ParameterError(source, "holds no recordings",
                                 expected="files ending in " + ", ".join(SUFFIXES))
        return [_with_decoder(j, decoder) for j in jobs]
    if p.is_file() and p.suffix.lower() == ".csv":
        return [_with_decoder(j, decoder) for j in read_manifest(p, max_cer=max_cer)]
    if not p.exists():
        raise ParameterError(source, "no such file or folder",
                             expected="a folder of recordings or a manifest CSV")
    raise ParameterError(source, "is not a folder or a .csv manifest",
                         expected="a folder of recordings or a manifest CSV")


def _with_decoder(job: Job, decoder: str | None) -> Job:
    if decoder is None or "decoder" in job.decode_options:
        return job
    return replace(job, decode_options={**job.decode_options, "decoder": decoder})


def _figure_name(job: Job, chash: str, shash: str) -> str:
    stem = "".join(c if c.isalnum() or c in "-_." else "_" for c in job.file)[-60:]
    return f"figures/{stem}-{chash[:8]}{shash[:4]}.png"


def _local(todo: list, workers: int) -> Iterator:
    """Run jobs here (one worker) or in a process pool; yield (job, key, outcome)."""
    if workers <= 1:
        for job, key, args in todo:
            yield job, key, process(job, *args)
        return
    import multiprocessing
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
    from concurrent.futures.process import BrokenProcessPool

    # a fresh interpreter per worker: a forked child would inherit the store's connection
    method = "forkserver" if "forkserver" in multiprocessing.get_all_start_methods() else "spawn"
    ctx = multiprocessing.get_context(method)
    pending: dict = {}
    queue = iter(todo)
    with ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as pool:
        while True:
            # a short queue: a killed run has only these in flight
            while len(pending) < 2 * workers:
                item = next(queue, None)
                if item is None:
                    break
                job, key, args = item
                pending[pool.submit(process, job, *args)] = (job, key)
            if not pending:
                return
            done, _ = wait(pending, return_when=FIRST_COMPLETED)
            for fut in done:
                job, key = pending.pop(fut)
                try:
                    outcome = fut.result()
                except BrokenProcessPool as err:
                    outcome = _lost(job, key, f"worker process died ({err})")
                yield job, key, outcome


def _lost(job: Job, key: tuple[str, str], why: str) -> Outcome:
    return Outcome(*key, status="failed", error=f"{job.file}: {why}", decode=None,
                   verification=None, capture_metadata={}, figure=None, warnings=(),
                   elapsed_s=0.0)


def _dask(todo: list, scheduler: str, timeout_s: float) -> Iterator:
    """Connect to a Dask distributed scheduler now; the iterator yields (job, key, outcome)."""
    if importlib.util.find_spec("distributed") is None:
        raise ParameterError(scheduler, "--scheduler needs Dask distributed, which is not "
                             "installed", expected="pip install 'okdecode[cluster]'")
    from distributed import Client, as_completed

    try:
        client = Client(scheduler, timeout=f"{timeout_s}s", set_as_default=False)
    except (OSError, TimeoutError, ValueError) as err:
        raise ParameterError(scheduler, f"cannot reach the Dask scheduler ({err})",
                             expected="an address such as tcp://host:8786") from err

    def results() -> Iterator:
        try:
            futures = {}
            for job, key, args in todo:
                futures[client.submit(process, job, *args, pure=False)] = (job, key)
            for fut in as_completed(list(futures), loop=client.loop):
                job, key = futures.pop(fut)
                try:
                    outcome = fut.result()
                except Exception as err:  # noqa: BLE001 - a lost worker fails only its jobs
                    outcome = _lost(job, key, f"Dask task failed ({type(err).__name__}: {err})")
                yield job, key, outcome
        finally:
            client.close()

    return results()


def run(source: str | os.PathLike, out: str | os.PathLike, *, workers: int | None = None,
        scheduler: str | None = None, max_cer: float = 0.0, decoder: str | None = None,
        report: bool = True,
        figures: bool | None = None, progress: bool | None = None,
        on_result: Callable[[dict], None] | None = None,
        connect_timeout_s: float = 10.0) -> Summary:
    """Process a campaign into ``out``: store, exports and report.

    Parameters
    ----------
    source : str or PathLike
        A folder of recordings (searched recursively) or a manifest CSV.
    out : str or PathLike
        The output folder (made if missing): ``results.sqlite``, ``results.csv``,
        ``results.json``, ``report.html`` and ``figures/``.
    workers : int, optional
        Worker processes; default: the number of CPUs. With 1, the recordings are
        decoded in this process.
    scheduler : str, optional
        Address of a Dask distributed scheduler; the work then runs there (the
        recordings and ``out`` must be reachable from its workers at the same paths).
    max_cer : float
        Largest character error rate counted as received (0: exact).
    decoder : str, optional
        Decision method (``"threshold"`` or ``"sequence"``) of every recording whose
        manifest row names none; default the receiver's.
    report : bool
        Write ``report.html``.
    figures : bool, optional
        Write a figure per recording through ``okdecode.plot.write_figure``; default:
        when that module exists.
    progress : bool, optional
        Show a progress bar on stderr; default: when stderr is a terminal.
    on_result : callable, optional
        Called in this process with each stored row (a dict) as it is stored.
    connect_timeout_s : float
        How long to try to reach the scheduler, s.

    Returns
    -------
    Summary
        Its :attr:`Summary.exit_status` is 0 when all recordings were processed and 1 when
        some failed.

    Raises
    ------
    ParameterError
        If the batch cannot start: bad input or manifest, an output folder that cannot be
        made or holds a foreign store, or an unusable scheduler.
    """
    if not (isinstance(max_cer, (int, float)) and 0.0 <= max_cer <= 1.0):
        raise ParameterError("--max-cer", f"{max_cer!r}", expected="a number from 0 to 1")
    if workers is None:
        # the CPUs this process may use (a container's share), not all the machine has
        workers = (len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity")
                   else os.cpu_count() or 1)
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise ParameterError("--workers", f"{workers!r}", expected="a count >= 1")
    out_dir = Path(out)
    jobs = load_jobs(source, out=out_dir, max_cer=max_cer, decoder=decoder)
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise ParameterError(out, f"cannot be made ({err.strerror})",
                             expected="a writable folder") from err
    out_abs = str(out_dir.resolve())
    if figures is None:
        figures = True
    with Store(out_dir / STORE_NAME) as store:
        todo, keys, seen = [], [], set()
        skipped = 0
        early: list[tuple[Job, tuple[str, str], Outcome]] = []
        for job in jobs:
            shash = job.settings_hash()
            try:
                chash = content_hash(job.path)
            except OSError as err:
                # no content to key on: key the failure by the name, so it is stored too
                chash = "unread:" + hashlib.sha256(job.file.encode()).hexdigest()
                problem = "no such file" if isinstance(err, FileNotFoundError) else (
                    f"cannot be read ({err.strerror})")
                key = (chash, shash)
                if key not in seen:
                    seen.add(key)
                    keys.append(key)
                    early.append((job, key, _lost(job, key, problem)))
                continue
            key = (chash, shash)
            if key in seen:
                continue  # the same content with the same settings is decoded once
            seen.add(key)
            keys.append(key)
            if store.status(key) == "ok":
                store.refresh(job, key)
                skipped += 1
                continue
            fig = _figure_name(job, chash, shash) if figures else None
            todo.append((job, key, (chash, fig, out_abs)))
        bar = _Bar(len(todo) + len(early), enabled=progress)
        results = (_dask(todo, scheduler, connect_timeout_s) if scheduler
                   else _local(todo, workers))

        def stream():
            yield from early
            yield from results

        try:
            for job, key, outcome in stream():
                store.put(job, outcome)
                bar.step(job.file)
                if on_result is not None:
                    on_result(store.row(key))
        finally:
            bar.close()
        rows = store.rows(keys)
    n_failed = sum(r["status"] == "failed" for r in rows)
    verified = [r for r in rows if r["received"] is not None]
    exports = write_exports(rows, out_dir)
    report_path = None
    if report:
        from .campaign import write_report

        report_path = str(write_report(rows, out_dir / "report.html"))
    return Summary(out=str(out_dir), n_recordings=len(keys), n_processed=len(todo),
                   n_skipped=skipped, n_failed=n_failed,
                   n_received=sum(r["received"] for r in verified) if verified else None,
                   store=str(out_dir / STORE_NAME), report=report_path, exports=exports,
                   keys=tuple(keys))

