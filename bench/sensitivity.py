"""Sensitivity: character error rate against C/N0 for the sequence decoder, the threshold
path and the genie receiver, with the 5 % crossing points; and the sequence decoder's speed.

    python bench/sensitivity.py            # 18 to 38 dB-Hz in 1 dB steps, 20 messages a point
    python bench/sensitivity.py --quick    # 2 dB steps, 8 messages a point
    python bench/sensitivity.py --speed    # only the decode speed
    python bench/sensitivity.py --case "5 WPM" --case "8 WPM" --messages 10   # slow code

Cases: machine-timed code at 12, 20 and 30 WPM; hand-keyed code at 20 WPM (jitter 10 %,
weight 10 %, dash/dot 3.3), whose genie knows the true element boundaries; slow fading of
15 dB at 20 WPM. okdecode knows neither the carrier nor the speed. CER is the edit distance
over the length of the sent text, both as okdecode.text.canonical spells them, pooled over
the messages of a point. Every recording is seeded: a run repeats exactly.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import genie  # noqa: E402

from okdecode import sequence  # noqa: E402
from okdecode.receiver import decode_array  # noqa: E402
from okdecode.synth import synth  # noqa: E402
from okdecode.text import canonical  # noqa: E402
from okdecode.verify import edit_distance  # noqa: E402

CASES = {
    "12 WPM": {"wpm": 12.0},
    "20 WPM": {"wpm": 20.0},
    "30 WPM": {"wpm": 30.0},
    "hand-keyed 20 WPM": {"wpm": 20.0, "jitter": 0.10, "weight": 0.10, "dash_dot_ratio": 3.3},
    "fading 15 dB 20 WPM": {"wpm": 20.0, "fading_db": 15.0},
}
#: Run on request only (``--case``): slow code makes long recordings.
EXTRA_CASES = {
    "5 WPM": {"wpm": 5.0},
    "8 WPM": {"wpm": 8.0},
}
DECODERS = ("sequence", "threshold", "genie")
TARGET_CER = 0.05
_ALPHABET = "ABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789"


def message(index: int) -> str:
    """Five invented groups of 2 to 5 letters and figures (seeded by the index)."""
    rng = np.random.default_rng(7000 + index)
    groups = ["".join(rng.choice(list(_ALPHABET), size=int(rng.integers(2, 6))))
              for _ in range(5)]
    return " ".join(groups)


def _one(job: tuple[str, float, int, bool]) -> tuple[str, float, int, dict, object]:
    """Decode one recording three ways; the genie's slots come back for its threshold."""
    case, cn0_dbhz, index, carrier_known = job
    sent = message(index)
    every = {**CASES, **EXTRA_CASES}
    seed = int(1e6 * list(every).index(case) + 1e3 * cn0_dbhz + index)
    rec = synth(sent, cn0_dbhz=cn0_dbhz, seed=seed, **every[case])
    truth = canonical(rec.truth.text)
    options = {"carrier_hz": rec.truth.scenario.carrier_hz} if carrier_known else {}
    # each decoder as a user runs it (okdecode decode --decoder ...)
    texts = {name: decode_array(rec.samples, rec.rate_hz, decoder=name, **options).text
             for name in ("threshold", "sequence")}
    errors = {name: edit_distance(canonical(t), truth) for name, t in texts.items()}
    return case, cn0_dbhz, len(truth), errors, (genie.measure(rec), truth)


def crossing(cn0_dbhz: np.ndarray, cer: np.ndarray, target: float = TARGET_CER
             ) -> float | None:
    """C/N0 above which the CER stays under the target, interpolated on log CER.

    None when even the lowest C/N0 is under the target or the highest is not.
    """
    above = np.flatnonzero(cer >= target)
    if above.size == 0 or above[-1] == cer.size - 1:
        return None
    i = int(above[-1])
    y0, y1 = math.log(cer[i]), math.log(max(cer[i + 1], 1e-4))
    x0, x1 = cn0_dbhz[i], cn0_dbhz[i + 1]
    return float(x0 + (math.log(target) - y0) * (x1 - x0) / (y1 - y0))


def sensitivity(cn0_grid: np.ndarray, n_messages: int, *, carrier_known: bool,
                workers: int, cases: list[str] | None = None
                ) -> dict[str, dict[str, np.ndarray]]:
    cases = cases or list(CASES)
    jobs = [(case, float(c), i, carrier_known) for case in cases for c in cn0_grid
            for i in range(n_messages)]
    chars: dict = {}
    errs: dict = {}
    slots: dict = {}
    with ProcessPoolExecutor(max_workers=workers) as pool:
        for case, c, n_chars, errors, genie_part in pool.map(_one, jobs, chunksize=4):
            key = (case, c)
            chars[key] = chars.get(key, 0) + n_chars
            for name, e in errors.items():
                errs[(name,) + key] = errs.get((name,) + key, 0) + e
            slots.setdefault(key, []).append(genie_part)
    for key, parts in slots.items():
        # the genie's one fixed threshold: the best over all slots of the point
        b = genie.best_fixed_threshold([p[0] for p in parts])
        errs[("genie",) + key] = sum(edit_distance(genie.text(s, b), t) for s, t in parts)
    out: dict[str, dict[str, np.ndarray]] = {}
    for case in cases:
        out[case] = {name: np.array([errs[(name, case, float(c))] / chars[(case, float(c))]
                                     for c in cn0_grid]) for name in DECODERS}
    return out


def _fmt(x: float | None) -> str:
    return "   n/a" if x is None else f"{x:6.2f}"


def report(cn0_grid: np.ndarray, result: dict, png: str, title: str) -> None:
    for case, cers in result.items():
        print(f"\n{case}: CER (%) against C/N0")
        print("C/N0 dB-Hz " + "".join(f"{name:>11}" for name in DECODERS))
        for i, c in enumerate(cn0_grid):
            print(f"{c:10.1f} " + "".join(f"{100 * cers[n][i]:11.2f}" for n in DECODERS))
    print("\n5 % CER crossing, dB-Hz, and differences, dB")
    print(f"{'case':22}{'sequence':>9}{'threshold':>10}{'genie':>8}{'seq-genie':>11}"
          f"{'thr-genie':>11}{'seq-thr':>9}")
    for case, cers in result.items():
        x = {n: crossing(cn0_grid, cers[n]) for n in DECODERS}

        def diff(p: str, q: str, x=x) -> str:
            return _fmt(None if x[p] is None or x[q] is None else x[p] - x[q])

        print(f"{case:22}{_fmt(x['sequence']):>9}{_fmt(x['threshold']):>10}"
              f"{_fmt(x['genie']):>8}{diff('sequence', 'genie'):>11}"
              f"{diff('threshold', 'genie'):>11}{diff('sequence', 'threshold'):>9}")
    _plot(cn0_grid, result, png, title)
    print(f"\nfigure: {png}")


def _plot(cn0_grid: np.ndarray, result: dict, png: str, title: str) -> None:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(4 * len(result), 3.6), constrained_layout=True)
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, len(result), sharey=True)
    for ax, (case, cers) in zip(axes, result.items(), strict=True):
        for name, style in zip(DECODERS, ("o-", "s--", "^:"), strict=True):
            ax.semilogy(cn0_grid, np.maximum(cers[name], 1e-3), style, label=name, ms=3)
        ax.axhline(TARGET_CER, color="grey", lw=0.8)
        ax.set_title(case)
        ax.set_xlabel("C/N0, dB-Hz")
        ax.set_ylim(1e-3, 1.5)
        ax.grid(True, which="both", alpha=0.3)
    axes[0].set_ylabel("character error rate")
    axes[0].legend()
    fig.suptitle(title)
    fig.savefig(png, dpi=110)


def speed() -> None:
    """Real-time factor of decode_array and of decode_array plus the sequence decoder."""
    text = " ".join(message(i) for i in range(12))
    for wpm, cn0 in ((20.0, 30.0), (30.0, 30.0), (20.0, 24.0)):
        rec = synth(text, wpm=wpm, cn0_dbhz=cn0, seed=5, rate_hz=8000.0)
        duration_s = rec.samples.size / rec.rate_hz
        best_thr = best_seq = math.inf
        for _ in range(3):
            t0 = time.process_time()
            r = decode_array(rec.samples, rec.rate_hz)
            t1 = time.process_time()
            sequence.decode_reception_text(r)
            t2 = time.process_time()
            best_thr, best_seq = min(best_thr, t1 - t0), min(best_seq, t2 - t1)
        print(f"8 kHz, {wpm:.0f} WPM, {cn0:.0f} dB-Hz, {duration_s:.0f} s: threshold "
              f"{duration_s / best_thr:.0f}x real time, threshold + sequence "
              f"{duration_s / (best_thr + best_seq):.0f}x (sequence alone "
              f"{duration_s / best_seq:.0f}x; CPU time, best of 3)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="2 dB steps, 8 messages")
    parser.add_argument("--speed", action="store_true", help="only the decode speed")
    parser.add_argument("--carrier-known", action="store_true",
                        help="give okdecode the carrier (speed still unknown)")
    parser.add_argument("--messages", type=int, default=None)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--png", default="sensitivity.png")
    parser.add_argument("--case", action="append", default=None,
                        choices=list(CASES) + list(EXTRA_CASES),
                        help="only this case (repeat for more); 5 and 8 WPM only this way")
    args = parser.parse_args()
    if args.case is None:
        speed()
    if args.speed:
        return
    step, n = (2.0, 8) if args.quick else (1.0, 20)
    n = args.messages or n
    grid = np.arange(18.0, 38.0 + step / 2, step)
    t0 = time.perf_counter()
    result = sensitivity(grid, n, carrier_known=args.carrier_known, workers=args.workers,
                         cases=args.case)
    title = f"carrier {'given' if args.carrier_known else 'unknown'}, speed unknown"
    print(f"\n{len(result)} cases x {grid.size} points x {n} messages in "
          f"{time.perf_counter() - t0:.0f} s; {title}")
    report(grid, result, args.png, f"okdecode: CER against C/N0, {title}")


if __name__ == "__main__":
    main()
