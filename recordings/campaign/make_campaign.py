"""Make the demo range-test campaign: eight FLAC recordings of the beacon XQ7ZB and a manifest.

An invented field test: the beacon XQ7ZB keys "VVV DE XQ7ZB" at 20 WPM on a 700 Hz tone,
and a receiver is carried from 50 m to 3 km along the Tillowmere valley. The C/N0 at each
site follows free-space loss from 50 dB-Hz at 50 m (20 dB per decade of distance: Friis)
plus a few dB of seeded scatter (ground reflections, antenna height), so the far sites
fall below the decoding threshold. Run from anywhere:

    python recordings/campaign/make_campaign.py

It rewrites the FLAC files and manifest.csv beside itself; the same seeds give the same
files.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np

from okdecode.synth import synth_file

MESSAGE = "VVV DE XQ7ZB"
CN0_AT_50_M_DBHZ = 50.0
SLOPE_DB_PER_DECADE = -20.0  # free space (Friis)
SCATTER_DB = 2.5  # standard deviation of the site-to-site scatter
SEED = 7

# distance, site (invented), antenna, receiver height; all fictional
SITES = [
    (50, "Ostle Farm gate", "whip", 1.5),
    (120, "Carrow Mead stile", "whip", 1.5),
    (250, "Brackenmoor lane", "whip", 1.5),
    (450, "Hollin Cross", "dipole", 2.0),
    (800, "Tillowmere bridge", "dipole", 2.0),
    (1300, "Wendle Rise", "dipole", 3.0),
    (2000, "Fallowby church path", "dipole", 3.0),
    (3000, "Quarry Top cairn", "dipole", 3.0),
]


def main() -> None:
    here = Path(__file__).resolve().parent
    rng = np.random.default_rng(SEED)
    scatter = rng.normal(0.0, SCATTER_DB, len(SITES))
    rows = []
    for i, ((distance_m, site, antenna, height_m), extra_db) in enumerate(
            zip(SITES, scatter, strict=True)):
        cn0 = CN0_AT_50_M_DBHZ + SLOPE_DB_PER_DECADE * math.log10(distance_m / 50) + extra_db
        name = f"xq7zb-{distance_m:04d}m.flac"
        synth_file(here / name, MESSAGE, rate_hz=8000.0, carrier_hz=700.0, wpm=20.0,
                   jitter=0.03, cn0_dbhz=cn0, lead_s=0.4, tail_s=0.4, seed=100 + i,
                   subtype="PCM_16")
        rows.append({"file": name, "distance_m": distance_m, "expect": MESSAGE, "site": site,
                     "antenna": antenna, "height_m": height_m,
                     "true_cn0_dbhz": f"{cn0:.1f}"})
    with open(here / "manifest.csv", "w", newline="", encoding="utf-8") as f:
        w = csv.DictWriter(f, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    for r in rows:
        print(f"{r['file']}  {r['distance_m']:>5} m  C/N0 {r['true_cn0_dbhz']} dB-Hz")


if __name__ == "__main__":
    main()
