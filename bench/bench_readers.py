"""Reader throughput: CSV traces in rows per second against a binary file of the same samples,
and raw I/Q (cu8 at 2.048 MS/s, cf32_le at 10 MS/s) in samples per second and real time.

Prints figures; asserts nothing.

    python bench/bench_readers.py [--rows 10000000] [--seconds 30] [--keep DIR]

CSV: three exports of the same keyed trace are written (a time column and volts with
comma separators; the same with semicolons and decimal commas; integer ADC codes under a
sample-interval line), each is opened with ``open_capture`` (one parse, which is all the
reading a trace needs) and the rows per second are printed beside reading the same samples
from a binary ``rf32_le`` file through the raw reader.

I/Q: a keyed carrier in noise is written as cu8 at 2.048 MS/s and as cf32_le at 10 MS/s,
each ``--seconds`` long; reading every block through ``open_capture`` and decoding with
``decode_file`` are timed and given as samples per second and multiples of real time.
"""

from __future__ import annotations

import argparse
import math
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np

from okdecode.capture import open_capture
from okdecode.receiver import decode_file
from okdecode.synth import key

MESSAGE = "VVV DE XQ7ZB XQ7ZB BEACON"
BLOCK = 1 << 20


def keyed_blocks(n: int, rate_hz: float, carrier_hz: float, *, iq: bool, seed: int):
    """A carrier keyed with MESSAGE (repeated) plus noise, as blocks of float32/complex64."""
    keying = key(MESSAGE, wpm=20, start_s=0.5)
    period_s = keying.end_s[-1] + 1.0
    rng = np.random.default_rng(seed)
    step = 2 * math.pi * carrier_hz / rate_hz
    for start in range(0, n, BLOCK):
        idx = np.arange(start, min(start + BLOCK, n))
        t = (idx / rate_hz) % period_s
        k = np.searchsorted(keying.start_s, t, side="right") - 1
        on = (k >= 0) & (t < keying.end_s[np.maximum(k, 0)])
        if iq:
            x = 0.3 * on * np.exp(1j * (step * idx))
            x = x + (rng.standard_normal(idx.size) + 1j * rng.standard_normal(idx.size)) * 0.05
            yield x.astype(np.complex64)
        else:
            x = 0.4 * on * np.cos(step * idx) + rng.standard_normal(idx.size) * 0.15
            yield x.astype(np.float32)


def write_csv(folder: Path, n: int) -> dict[str, Path]:
    rate_hz = 10e6
    paths = {"comma": folder / "trace_comma.csv", "semicolon": folder / "trace_semicolon.csv",
             "codes": folder / "trace_codes.csv", "binary": folder / "trace.rf32_le"}
    table = np.array([f"{v:4d}\n".encode() for v in range(-128, 128)], dtype="S5")
    with open(paths["comma"], "wb") as fa, open(paths["semicolon"], "wb") as fb, \
            open(paths["codes"], "wb") as fc, open(paths["binary"], "wb") as fd:
        fa.write(b"Model,XQ-SCOPE\nTime (s),CH1 (V)\n")
        fb.write(b"Model;XQ-SCOPE\nTime (s);CH1 (V)\n")
        fc.write(b"Model,XQ-SCOPE\nSample Interval,1.0E-07,s\nCH1\n")
        start = 0
        for x in keyed_blocks(n, rate_hz, 1.4529e6, iq=False, seed=1):
            t = (start + np.arange(x.size)) / rate_hz
            codes = np.clip(np.rint(x * 100), -127, 127).astype(np.int16)
            volts = codes / 100.0
            lines = np.char.add(np.char.add(np.char.mod("%.7e", t), ","),
                                np.char.mod("%.2f", volts))
            text = ("\n".join(lines.tolist()) + "\n").encode()
            fa.write(text)
            fb.write(text.replace(b",", b";").replace(b".", b","))
            fc.write(table.view(np.uint8).reshape(256, 5)[codes + 128].tobytes())
            volts.astype("<f4").tofile(fd)
            start += x.size
    return paths


def timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t0


def bench_csv(folder: Path, n: int) -> None:
    print(f"writing {n} rows of trace in three layouts and as rf32_le ...", flush=True)
    paths, took = timed(lambda: write_csv(folder, n))
    print(f"  written in {took:.1f} s")

    def read_all(path, **options):
        cap = open_capture(path, **options)
        total = sum(b.shape[0] for b in cap.blocks())
        return cap, total

    (_, total), binary_s = timed(lambda: read_all(paths["binary"], rate_hz=10e6))
    print(f"binary rf32_le: {total} samples in {binary_s:.3f} s, "
          f"{total / binary_s / 1e6:.1f} M samples/s")
    for name in ("comma", "semicolon", "codes"):
        (cap, total), took = timed(lambda name=name: read_all(paths[name]))
        size_mb = paths[name].stat().st_size / 1e6
        print(f"CSV {name:9s}: {total} rows ({size_mb:.0f} MB) in {took:.2f} s, "
              f"{total / took / 1e6:.2f} M rows/s, {took / binary_s:.0f}x the binary read; "
              f"rate {cap.rate_hz:g} Hz")


def bench_iq(folder: Path, name: str, rate_hz: float, seconds: float) -> None:
    n = int(rate_hz * seconds)
    path = folder / f"beacon.{'cu8' if name == 'cu8' else 'cf32'}"
    with open(path, "wb") as f:
        for z in keyed_blocks(n, rate_hz, rate_hz * 0.1, iq=True, seed=2):
            if name == "cu8":
                comps = np.empty(2 * z.size, dtype=np.float32)
                comps[0::2], comps[1::2] = z.real, z.imag
                np.clip(np.rint(comps * 127.5 + 127.5), 0, 255).astype(np.uint8).tofile(f)
            else:
                z.astype("<c8").tofile(f)

    def read_all():
        cap = open_capture(path, rate_hz=rate_hz, iq_format=name)
        return sum(b.shape[0] for b in cap.blocks())

    total, read_s = timed(read_all)
    result, decode_s = timed(lambda: decode_file(path, rate_hz=rate_hz, iq_format=name))
    size_mb = path.stat().st_size / 1e6
    print(f"{name} at {rate_hz / 1e6:g} MS/s, {seconds:g} s ({size_mb:.0f} MB): "
          f"read {total / read_s / 1e6:.0f} M samples/s ({seconds / read_s:.0f}x real time); "
          f"decode {total / decode_s / 1e6:.1f} M samples/s ({seconds / decode_s:.1f}x real "
          f"time), text {result.text[:30]!r}")
    path.unlink()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=10_000_000)
    parser.add_argument("--seconds", type=float, default=30.0)
    parser.add_argument("--keep", type=Path, default=None, help="folder for the files")
    args = parser.parse_args()
    folder = args.keep or Path(tempfile.mkdtemp(prefix="okdecode-bench-"))
    folder.mkdir(parents=True, exist_ok=True)
    try:
        bench_csv(folder, args.rows)
        bench_iq(folder, "cu8", 2.048e6, args.seconds)
        bench_iq(folder, "cf32_le", 10e6, args.seconds)
    finally:
        if args.keep is None:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
