"""Peak memory of decoding a 2 GB cf32_le file (10 MS/s, about 27 s), in a fresh process.

Prints figures; asserts nothing.

    python bench/bench_large_iq.py [--gigabytes 2] [--folder /tmp]

A keyed carrier in noise is written block by block as raw cf32_le, then decoded by
``okdecode.receiver.decode_file`` in a child process that prints its wall time and its
peak resident memory (``resource.getrusage(RUSAGE_SELF).ru_maxrss``); the file is removed.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_readers import keyed_blocks  # noqa: E402

RATE_HZ = 10e6
CHILD = """
import resource, sys, time
t0 = time.perf_counter()
from okdecode.receiver import decode_file
result = decode_file(sys.argv[1], rate_hz=float(sys.argv[2]), iq_format="cf32_le",
                     center_hz=7.0e6)
took = time.perf_counter() - t0
peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
print(f"decoded {result.duration_s:.1f} s in {took:.1f} s "
      f"({result.duration_s / took:.1f}x real time); peak resident memory {peak_mb:.0f} MB")
print(f"text {result.text!r}, carrier {result.carrier_hz:.1f} Hz")
"""


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--gigabytes", type=float, default=2.0)
    parser.add_argument("--folder", type=Path, default=Path("/tmp"))
    args = parser.parse_args()
    n = int(args.gigabytes * 2**30 / 8)
    path = args.folder / "okdecode-large.cf32"
    t0 = time.perf_counter()
    with open(path, "wb") as f:
        for z in keyed_blocks(n, RATE_HZ, 1.25e6, iq=True, seed=3):
            z.astype("<c8").tofile(f)
    size_gb = path.stat().st_size / 2**30
    print(f"wrote {path} ({size_gb:.2f} GiB, {n} samples, {n / RATE_HZ:.1f} s at 10 MS/s) "
          f"in {time.perf_counter() - t0:.0f} s", flush=True)
    try:
        subprocess.run([sys.executable, "-c", CHILD, str(path), str(RATE_HZ)], check=True)
    finally:
        path.unlink(missing_ok=True)


if __name__ == "__main__":
    main()
