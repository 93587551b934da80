"""Known-message detection versus letter-by-letter decoding, on the same recordings.

For each C/N0, seeded synthetic recordings of one ~40-character message (real audio,
8 kHz, 20 WPM by default) are decoded (character error rate of the best copy, as
``okdecode verify`` reports it) and searched for the message's keying (detected or not,
with the full search: 5 to 50 WPM, Farnsworth stretches, the carrier guessed when the
decoder found none). Noise-only recordings and recordings of other messages of the same
length give the false-alarm rates. Prints a table, writes a PNG, and closes with the C/N0
where decoding reaches 5 % CER, where detection reaches 90 %, and the margin between.

    python bench/bench_detection.py [--trials 20] [--out /tmp] [--jobs 2]

Figures, not tests: nothing here asserts.
"""

from __future__ import annotations

import argparse
import math
import os
import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np

MSG = "VVV DE XQ7ZB BEACON TEST GRID KN42 73 <AR>"
_ALPHABET = list("ABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789")


def other_message(seed: int, length: int) -> str:
    rng = np.random.default_rng(seed)
    words = ["".join(rng.choice(_ALPHABET, size=rng.integers(2, 6))) for _ in range(12)]
    return " ".join(words)[:length].strip()


def one(job: tuple) -> dict:
    """Decode and search one recording; returns its figures."""
    from okdecode.capture import from_array
    from okdecode.receiver import decode_capture
    from okdecode.synth import synth
    from okdecode.verify import verify_reception

    kind, cn0, seed, args = job
    rate, wpm, message = args["rate"], args["wpm"], args["message"]
    if kind == "message":
        rec = synth(message, rate_hz=rate, wpm=wpm, cn0_dbhz=cn0, seed=seed,
                    carrier_hz=args["carrier"])
    elif kind == "other":
        rec = synth(other_message(seed, len(message)), rate_hz=rate, wpm=wpm, cn0_dbhz=cn0,
                    seed=seed, carrier_hz=args["carrier"], duration_s=args["duration_s"])
    else:  # noise alone, at the level the message recordings have at this C/N0
        rec = synth("", rate_hz=rate, cn0_dbhz=cn0, seed=seed, amplitude=0.05,
                    duration_s=args["duration_s"])
    capture = from_array(rec.samples, rec.rate_hz, source=f"{kind}-{cn0:g}-{seed}")
    t0 = time.perf_counter()
    reception = decode_capture(capture)
    v = verify_reception(reception, message, capture=capture)
    d = v.detection
    return {"kind": kind, "cn0": cn0, "seed": seed, "cer": v.cer,
            "detected": bool(d.detected),
            "fa": d.false_alarm_probability if d.false_alarm_probability is not None else 1.0,
            "cn0_est": d.cn0_dbhz, "carrier_found": reception.baseband is not None,
            "seconds": time.perf_counter() - t0}


def crossing(x: np.ndarray, y: np.ndarray, level: float, *, rising: bool) -> float | None:
    """First C/N0 where y crosses level, by linear interpolation."""
    for i in range(len(x) - 1):
        a, b = y[i], y[i + 1]
        if (rising and a < level <= b) or (not rising and a > level >= b):
            return float(x[i] + (level - a) * (x[i + 1] - x[i]) / (b - a))
    return None


def wilson(k: int, n: int, z: float = 1.96) -> tuple[float, float]:
    """Wilson score interval of a binomial proportion (E. B. Wilson, JASA 22, 1927)."""
    if n == 0:
        return 0.0, 1.0
    p = k / n
    den = 1 + z * z / n
    mid = (p + z * z / (2 * n)) / den
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / den
    return max(0.0, mid - half), min(1.0, mid + half)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--trials", type=int, default=20, help="recordings per C/N0")
    ap.add_argument("--false-trials", type=int, default=60,
                    help="noise-only and other-message recordings, each")
    ap.add_argument("--cn0", type=float, nargs="+",
                    default=[10, 12, 14, 16, 18, 20, 22, 24, 25, 26, 27, 28, 30])
    ap.add_argument("--wpm", type=float, default=20.0)
    ap.add_argument("--rate", type=float, default=8000.0)
    ap.add_argument("--carrier", type=float, default=700.0)
    ap.add_argument("--message", default=MSG)
    ap.add_argument("--jobs", type=int, default=min(2, os.cpu_count() or 1))
    ap.add_argument("--out", default="/tmp", help="folder for bench_detection.png")
    args = ap.parse_args()
    from okdecode.text import units

    duration_s = (units(args.message) * 1.2 / args.wpm) + 1.0
    shared = {"rate": args.rate, "wpm": args.wpm, "message": args.message,
              "carrier": args.carrier, "duration_s": duration_s}
    jobs = [("message", c, s, shared) for c in args.cn0 for s in range(args.trials)]
    false_cn0 = (16.0, 22.0, 35.0)
    jobs += [("noise", false_cn0[s % 3], 10_000 + s, shared) for s in range(args.false_trials)]
    jobs += [("other", false_cn0[s % 3], 20_000 + s, shared) for s in range(args.false_trials)]
    t0 = time.perf_counter()
    with ProcessPoolExecutor(max_workers=args.jobs) as pool:
        rows = list(pool.map(one, jobs, chunksize=2))
    wall = time.perf_counter() - t0
    print(f"message {args.message!r} ({len(args.message)} characters), {args.wpm:g} WPM, "
          f"{args.rate / 1000:g} kHz real audio, {args.trials} recordings per C/N0; "
          f"{len(jobs)} recordings in {wall:.0f} s")
    print(f"{'C/N0 dB-Hz':>10} {'mean CER':>9} {'CER<=5%':>8} {'P(detect)':>10} "
          f"{'95% interval':>14} {'C/N0 est':>9} {'carrier':>8}")
    cn0s = np.array(sorted(set(args.cn0)))
    cer_mean, pd = [], []
    for c in cn0s:
        r = [x for x in rows if x["kind"] == "message" and x["cn0"] == c]
        cer = np.array([x["cer"] for x in r])
        k = sum(x["detected"] for x in r)
        lo, hi = wilson(k, len(r))
        est = [x["cn0_est"] for x in r if x["cn0_est"] is not None and x["detected"]]
        found = np.mean([x["carrier_found"] for x in r])
        cer_mean.append(cer.mean())
        pd.append(k / len(r))
        print(f"{c:10.1f} {cer.mean():9.3f} {np.mean(cer <= 0.05):8.2f} {k / len(r):10.2f} "
              f"  [{lo:.2f}, {hi:.2f}] "
              f"{(np.median(est) if est else float('nan')):9.1f} {found:8.2f}")
    for kind in ("noise", "other"):
        r = [x for x in rows if x["kind"] == kind]
        k = sum(x["detected"] for x in r)
        lo, hi = wilson(k, len(r))
        fa = np.array([x["fa"] for x in r])
        cal = "  ".join(f"P(fa<={a:g})={np.mean(fa <= a):.3f}" for a in (0.01, 0.1, 0.5))
        print(f"false alarms, {kind:5s}: {k}/{len(r)} = {k / max(len(r), 1):.3f} "
              f"[{lo:.3f}, {hi:.3f}] (C/N0 {', '.join(f'{c:g}' for c in false_cn0)} dB-Hz)"
              + (f"; calibration {cal}" if kind == "noise" else ""))
    cer_mean, pd = np.array(cer_mean), np.array(pd)
    c_dec = crossing(cn0s, cer_mean, 0.05, rising=False)
    c_det = crossing(cn0s, pd, 0.9, rising=True)
    if c_det is None and pd[0] >= 0.9:
        c_det = float(cn0s[0])  # at or below the lowest level measured
    speed = np.median([x["seconds"] for x in rows])
    print(f"median time per recording (decode, verify and search): {speed:.2f} s")
    if c_dec is not None and c_det is not None:
        print(f"decoding reaches 5 % CER at {c_dec:.1f} dB-Hz; detection reaches 90 % at "
              f"{c_det:.1f} dB-Hz: a margin of {c_dec - c_det:.1f} dB")
    else:
        print(f"crossings not inside the levels measured (decode {c_dec}, detect {c_det})")
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(7, 4.2))
    ax.plot(cn0s, pd, "o-", label="P(detect), known-message search")
    ax.plot(cn0s, cer_mean, "s-", label="mean CER, letter-by-letter decoding")
    ax.axhline(0.9, color="0.6", lw=0.8, ls="--")
    ax.axhline(0.05, color="0.6", lw=0.8, ls=":")
    for c, name in ((c_det, "90 % detection"), (c_dec, "5 % CER")):
        if c is not None:
            ax.axvline(c, color="0.4", lw=0.8)
            ax.text(c, 0.22, f" {name}\n {c:.1f} dB-Hz", fontsize=8)
    ax.set_xlabel("C/N0, dB-Hz")
    ax.set_ylabel("probability / error rate")
    ax.set_ylim(-0.02, 1.05)
    ax.set_title(f"{len(args.message)}-character message, {args.wpm:g} WPM, "
                 f"{args.rate / 1000:g} kHz")
    ax.legend(loc="center", bbox_to_anchor=(0.5, 0.55), fontsize=8)
    fig.tight_layout()
    os.makedirs(args.out, exist_ok=True)
    path = os.path.join(args.out, "bench_detection.png")
    fig.savefig(path, dpi=120)
    print(f"figure: {path}")


if __name__ == "__main__":
    main()
