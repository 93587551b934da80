"""Make the demo captures of recordings/: an invented beacon field test.

Scenario (fictional): the beacon QZ4RB keys its call and site from Kestrel Ridge; the
field team at Vellmar Flats answers by hand; a trainee practises with Farnsworth
spacing. Every call sign and place is invented (Q-prefixed call signs are not issued).

Run from the repository root: ``python recordings/make_recordings.py``. The files are
seeded, so the same okdecode makes the same files; ``truth.csv`` lists what each holds.
"""

from __future__ import annotations

import csv
from pathlib import Path

from okdecode.synth import synth_file

HERE = Path(__file__).resolve().parent

CAPTURES = [
    ("beacon_kestrel_ridge.flac", "QZ4RB QZ4RB BEACON KESTREL RIDGE 5W <AR>",
     dict(wpm=18.0, carrier_hz=650.0, cn0_dbhz=32.0, seed=11)),
    ("vellmar_hand_keyed.flac", "QZ4RB DE QY2LM RST 559 VELLMAR FLATS 73 <SK>",
     dict(wpm=15.0, carrier_hz=820.0, cn0_dbhz=34.0, jitter=0.08, weight=0.05,
          dash_dot_ratio=3.3, fading_db=8.0, fading_period_s=6.0, seed=12)),
    ("trainee_farnsworth.flac", "PARIS PARIS QZ4RB",
     dict(wpm=8.0, char_wpm=18.0, carrier_hz=560.0, cn0_dbhz=34.0, seed=13)),
    ("beacon_with_hum.flac", "QZ4RB BEACON TEST",
     dict(wpm=22.0, carrier_hz=1100.0, cn0_dbhz=33.0, hum_hz=50.0, hum_db=6.0, seed=14)),
]


def main() -> None:
    rows = []
    for name, text, opts in CAPTURES:
        truth = synth_file(HERE / name, text, rate_hz=8000.0, **opts)
        rows.append({"file": name, "text": truth.text, "wpm": opts["wpm"],
                     "char_wpm": opts.get("char_wpm", ""), "carrier_hz": opts["carrier_hz"],
                     "cn0_dbhz": opts["cn0_dbhz"], "duration_s": round(truth.duration_s, 2)})
        print(f"{name}: {truth.text!r}, {truth.duration_s:.1f} s")
    with open(HERE / "truth.csv", "w", newline="") as f:
        w = csv.DictWriter(f, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)


if __name__ == "__main__":
    main()
