"""Decode speed as a multiple of real time, against merely reading the file, and peak memory.

Makes one-hour 16-bit WAV recordings at 8 kHz and 48 kHz (an invented beacon keying its
call for an hour), then times, each in a fresh process as a user runs it:

- ``okdecode decode FILE --json`` (the whole job), and
- reading the same file block by block with soundfile (the floor any decoder pays),

and prints real-time factors and peak resident memory. Also prints the start-up time of
``okdecode --help`` and ``import okdecode``.

Usage: ``python bench/bench_decode.py [--minutes 60] [--keep DIR]``
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

READ = """
import sys, soundfile
with soundfile.SoundFile(sys.argv[1]) as f:
    for b in f.blocks(blocksize=1 << 18, dtype="float32", always_2d=True):
        pass
"""


# runs a Python command line and, at its exit, writes its own peak RSS (KiB) to stderr:
# RUSAGE_CHILDREN would give the largest of all children so far, not this one's
_PEAK = """
import resource, runpy, sys
args = sys.argv[1:]
try:
    if args[0] == "-c":
        sys.argv = ["-c"] + args[2:]
        exec(compile(args[1], "<bench>", "exec"), {"__name__": "__main__"})
    else:
        sys.argv = [args[1]] + args[2:]
        runpy.run_module(args[1], run_name="__main__", alter_sys=True)
finally:
    sys.stderr.write(f"peak-kib {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss}\\n")
"""


def run(cmd: list[str]) -> tuple[float, float, str]:
    """Wall time (s), peak RSS (MB) and stdout of one Python command (``python -m ...``
    or ``python -c ...``), in a fresh process."""
    assert cmd[0] == sys.executable and cmd[1] in ("-m", "-c")
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-c", _PEAK, *cmd[1:]], capture_output=True,
                          text=True)
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        raise RuntimeError(proc.stderr)
    peak = [line for line in proc.stderr.splitlines() if line.startswith("peak-kib ")]
    return wall, int(peak[-1].split()[1]) / 1024, proc.stdout


def best_of(cmd: list[str], n: int) -> tuple[float, float, str]:
    runs = [run(cmd) for _ in range(n)]
    return min(r[0] for r in runs), max(r[1] for r in runs), runs[0][2]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=60.0)
    ap.add_argument("--repeat", type=int, default=2, help="best of N runs")
    ap.add_argument("--keep", type=Path, default=None, help="folder to keep the files in")
    args = ap.parse_args()
    from okdecode.synth import synth_file

    folder = args.keep or Path(tempfile.mkdtemp(prefix="okdecode-bench-"))
    folder.mkdir(parents=True, exist_ok=True)
    words = int(args.minutes * 20)  # 20 WPM
    message = " ".join(["QZ4RB BEACON KESTREL RIDGE"] * (words // 4 + 1))
    exe = [sys.executable, "-m", "okdecode"]
    t_help = min(run(exe + ["--help"])[0] for _ in range(3))
    t_import = min(run([sys.executable, "-c", "import okdecode"])[0] for _ in range(3))
    t_python = min(run([sys.executable, "-c", "pass"])[0] for _ in range(3))
    # (each includes the small wrapper that reads the peak memory)
    print(f"start-up: okdecode --help {t_help:.3f} s, import okdecode {t_import:.3f} s "
          f"(bare python {t_python:.3f} s)")
    for rate_hz in (8000.0, 48000.0):
        path = folder / f"hour_{int(rate_hz)}.wav"
        if not path.exists():
            t0 = time.perf_counter()
            synth_file(path, message, wpm=20.0, carrier_hz=700.0, rate_hz=rate_hz,
                       cn0_dbhz=35.0, seed=1, duration_s=args.minutes * 60)
            print(f"made {path.name} in {time.perf_counter() - t0:.1f} s "
                  f"({path.stat().st_size / 1e6:.0f} MB)")
        import soundfile

        duration_s = soundfile.info(str(path)).duration
        t_read, m_read, _ = best_of([sys.executable, "-c", READ, str(path)], args.repeat)
        t_dec, m_dec, out = best_of(exe + ["decode", str(path), "--json"], args.repeat)
        result = json.loads(out)
        print(f"{rate_hz / 1e3:g} kHz, {duration_s / 60:.0f} min: decode {t_dec:.2f} s = "
              f"{duration_s / t_dec:.0f}x real time, peak {m_dec:.0f} MB; read only "
              f"{t_read:.2f} s = {duration_s / t_read:.0f}x, peak {m_read:.0f} MB; "
              f"decode/read {t_dec / t_read:.1f}; {len(result['text'])} characters, "
              f"C/N0 {result['cn0_dbhz']} dB-Hz, {result['wpm']} WPM")
    if args.keep is None:
        for p in folder.iterdir():
            p.unlink()
        os.rmdir(folder)


if __name__ == "__main__":
    main()
