"""Benchmark of okdecode batch: recordings per minute on 1 and 2 workers, and the overhead of
the results store and the report against decoding alone. Prints figures; asserts nothing.

    python bench/bench_batch.py [--n 100] [--seconds 3] [--figures]

A campaign of N short synthetic FLAC recordings (8 kHz, 16-bit, seeded, C/N0 falling with
distance so some fail) with a manifest and expected texts is made in a temporary folder.
"""

from __future__ import annotations

import argparse
import csv
import math
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from okdecode import batch, campaign
from okdecode.receiver import decode_file
from okdecode.synth import synth_file

MESSAGES = ("VVV XQ7ZB", "XQ7ZB TEST", "XQ7ZB DE XQ7ZB", "TEST 73")


def make_campaign(folder: Path, n: int, seconds: float) -> Path:
    rows = []
    for i in range(n):
        name = f"b{i:03d}.flac"
        distance_m = 50.0 * 60 ** (i / max(n - 1, 1))  # 50 m to 3 km
        cn0 = 50.0 - 20.0 * math.log10(distance_m / 50.0)
        msg = MESSAGES[i % len(MESSAGES)]
        synth_file(folder / name, msg, rate_hz=8000.0, wpm=25.0, cn0_dbhz=cn0,
                   duration_s=seconds, seed=i)
        rows.append({"file": name, "distance_m": f"{distance_m:.1f}", "expect": msg,
                     "site": f"bench {i}"})
    manifest = folder / "manifest.csv"
    with open(manifest, "w", newline="", encoding="utf-8") as f:
        w = csv.DictWriter(f, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    return manifest


def best(repeat: int, fn, *, pass_index: bool = False) -> float:
    """The fastest of `repeat` timed calls, s (or of fn's own figure, when it returns one)."""
    out = math.inf
    for k in range(max(1, repeat)):
        t0 = time.perf_counter()
        got = fn(k) if pass_index else fn()
        took = got if isinstance(got, float) else time.perf_counter() - t0
        out = min(out, took)
    return out


def cli_run(manifest: Path, out: Path, workers: int, figures: bool) -> float:
    cmd = [sys.executable, "-m", "okdecode", "batch", str(manifest), "--out", str(out),
           "--workers", str(workers)] + ([] if figures else ["--no-figures"])
    t0 = time.perf_counter()
    done = subprocess.run(cmd, capture_output=True, text=True)
    wall = time.perf_counter() - t0
    if done.returncode not in (0, 1):
        raise SystemExit(done.stderr)
    return wall


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=100, help="recordings in the campaign")
    ap.add_argument("--seconds", type=float, default=3.0, help="length of each, s")
    ap.add_argument("--repeat", type=int, default=2,
                    help="runs of each measurement; the fastest is shown (others share the CPUs)")
    ap.add_argument("--figures", action="store_true",
                    help="also time a run with a figure per recording (okdecode.plot)")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        (root / "rec").mkdir()
        t0 = time.perf_counter()
        manifest = make_campaign(root / "rec", args.n, args.seconds)
        print(f"campaign: {args.n} recordings of {args.seconds:g} s at 8 kHz, made in "
              f"{time.perf_counter() - t0:.1f} s")
        jobs = batch.read_manifest(manifest)
        decode_file(jobs[0].path)  # warm: imports and first-call costs
        alone = best(args.repeat, lambda: [decode_file(job.path) for job in jobs])
        print(f"decoding alone, one process:           {alone:6.2f} s  "
              f"{60 * args.n / alone:7.0f} recordings/min")
        hashes = [batch.content_hash(job.path) for job in jobs]
        outcomes: list = []
        work = best(args.repeat, lambda: outcomes.__setitem__(slice(None), [
            batch.process(job, chash) for job, chash in zip(jobs, hashes, strict=True)]))
        print(f"decode + verify (the worker's work):   {work:6.2f} s  "
              f"{60 * args.n / work:7.0f} recordings/min")
        t0 = time.perf_counter()
        for job in jobs:
            batch.content_hash(job.path)
        hash_s = time.perf_counter() - t0
        t0 = time.perf_counter()
        with batch.Store(root / "alone.sqlite") as store:
            for job, outcome in zip(jobs, outcomes, strict=True):
                store.put(job, outcome)
            rows = store.rows()
        store_s = time.perf_counter() - t0
        t0 = time.perf_counter()
        (root / "ex").mkdir()
        batch.write_exports(rows, root / "ex")
        export_s = time.perf_counter() - t0
        t0 = time.perf_counter()
        campaign.write_report(rows, root / "ex" / "report.html")
        report_only = time.perf_counter() - t0
        parts = hash_s + store_s + export_s + report_only
        print(f"  parts: hashing {hash_s:.2f} s, store {store_s:.2f} s "
              f"({1e3 * store_s / args.n:.1f} ms per transaction), exports {export_s:.2f} s, "
              f"report {report_only:.2f} s: {parts:.2f} s, {100 * parts / work:.1f} % of the "
              "work")
        stored, report_s = math.inf, math.inf
        for k in range(args.repeat):
            t0 = time.perf_counter()
            summary = batch.run(manifest, root / f"api{k}", workers=1, figures=False,
                                report=False)
            stored = min(stored, time.perf_counter() - t0)
            t0 = time.perf_counter()
            with batch.Store(summary.store) as store:
                rows = store.rows(summary.keys)
            campaign.write_report(rows, root / f"api{k}" / "report.html")
            report_s = min(report_s, time.perf_counter() - t0)
        print(f"batch, 1 worker, in process:           {stored:6.2f} s with hashing, store and "
              f"exports, + {report_s:.2f} s report")
        extra = stored + report_s - work
        print(f"  overhead of store, exports and report over the worker's work: "
              f"{extra:+.2f} s ({100 * extra / work:+.1f} %)")
        print(f"  received {summary.n_received} of {summary.n_recordings}, "
              f"failed {summary.n_failed}")
        t0 = time.perf_counter()
        again = batch.run(manifest, root / "api0", workers=1, figures=False)
        print(f"re-run, all {again.n_skipped} stored (hash, skip, exports, report): "
              f"{time.perf_counter() - t0:.2f} s")
        for workers in (1, 2):
            wall = best(args.repeat, lambda k, w=workers: cli_run(
                manifest, root / f"cli{w}-{k}", w, figures=False), pass_index=True)
            print(f"okdecode batch --workers {workers} (whole command): {wall:6.2f} s  "
                  f"{60 * args.n / wall:7.0f} recordings/min")
        if args.figures:
            for workers in (1, 2):
                wall = cli_run(manifest, root / f"fig{workers}", workers, figures=True)
                print(f"okdecode batch --workers {workers} with figures: {wall:6.2f} s  "
                      f"{60 * args.n / wall:7.0f} recordings/min")


if __name__ == "__main__":
    main()
