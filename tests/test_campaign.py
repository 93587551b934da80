"""Tests of okdecode.campaign: the path-loss fit, the range estimate and report.html."""

from __future__ import annotations

import csv
import html
import json
import math
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from okdecode import batch, campaign
from okdecode.synth import synth_file

CHROMIUM = shutil.which("chromium") or (
    "/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)


def friis_cn0_dbhz(distance_m: np.ndarray, *, frequency_hz: float = 144e6,
                   power_w: float = 1.0, noise_temperature_k: float = 290.0) -> np.ndarray:
    """C/N0 over a free-space link between isotropic antennas, dB-Hz.

    H. T. Friis, Proc. IRE 34(5), 1946: P_r = P_t (lambda / (4 pi d))**2; N0 = k T.
    """
    wavelength_m = 299_792_458.0 / frequency_hz
    received_w = power_w * (wavelength_m / (4 * np.pi * distance_m)) ** 2
    n0_w_per_hz = 1.380649e-23 * noise_temperature_k  # Boltzmann constant (SI, exact)
    return 10 * np.log10(received_w / n0_w_per_hz)


def test_the_fit_of_a_free_space_link_falls_20_db_per_decade():
    d = np.geomspace(10.0, 20_000.0, 9)
    fit = campaign.fit_path_loss(d, friis_cn0_dbhz(d))
    # Friis: received power goes as d**-2, 20 dB per decade of distance
    assert fit.slope_db_per_decade == pytest.approx(-20.0, abs=1e-9)
    assert fit.path_loss_exponent == pytest.approx(2.0, abs=1e-10)
    assert fit.intercept_dbhz == pytest.approx(float(friis_cn0_dbhz(np.array(1.0))), abs=1e-9)
    assert fit.slope_stderr_db == pytest.approx(0.0, abs=1e-9)
    assert fit.n_points == 9 and (fit.min_distance_m, fit.max_distance_m) == (10.0, 20_000.0)


def test_the_fit_and_its_uncertainty_match_scipy_on_scattered_figures(rng):
    d = np.geomspace(50.0, 3000.0, 40)
    y = friis_cn0_dbhz(d) + rng.normal(0.0, 3.0, d.size)
    fit = campaign.fit_path_loss(d, y)
    ref = stats.linregress(np.log10(d), y)  # scipy.stats.linregress, the reference
    assert fit.slope_db_per_decade == pytest.approx(ref.slope, rel=1e-10)
    assert fit.intercept_dbhz == pytest.approx(ref.intercept, rel=1e-10)
    assert fit.slope_stderr_db == pytest.approx(ref.stderr, rel=1e-10)
    # the true slope lies within 4 standard errors (Student t, 38 dof: p < 1e-3)
    assert abs(fit.slope_db_per_decade + 20.0) < 4 * fit.slope_stderr_db


def test_the_standard_error_is_the_spread_of_the_slope_over_repeated_campaigns(rng):
    d = np.geomspace(50.0, 3000.0, 12)
    slopes, errors = [], []
    for _ in range(300):
        fit = campaign.fit_path_loss(d, friis_cn0_dbhz(d) + rng.normal(0.0, 2.0, d.size))
        slopes.append(fit.slope_db_per_decade)
        errors.append(fit.slope_stderr_db)
    # Draper and Smith, ch. 1: sd(b) = sigma / sqrt(Sxx); E[b] = the true slope
    x = np.log10(d)
    theory = 2.0 / math.sqrt(float(((x - x.mean()) ** 2).sum()))
    assert np.std(slopes, ddof=1) == pytest.approx(theory, rel=0.15)  # 300 fits: ~4 % s.e.
    assert np.mean(errors) == pytest.approx(theory, rel=0.1)
    assert np.mean(slopes) == pytest.approx(-20.0, abs=4 * theory / math.sqrt(300))


def test_the_range_estimate_is_where_the_fit_meets_the_threshold():
    d = np.array([50.0, 100.0, 200.0, 400.0])
    fit = campaign.fit_path_loss(d, friis_cn0_dbhz(d))
    r = campaign.range_estimate_m(fit, 150.0)
    assert fit.cn0_dbhz(r) == pytest.approx(150.0, abs=1e-9)
    # free space: 20 dB below the fit at 400 m lies one decade further out
    at_400 = float(friis_cn0_dbhz(np.array(400.0)))
    assert campaign.range_estimate_m(fit, at_400 - 20.0) == pytest.approx(4000.0, rel=1e-9)


def test_no_fit_without_two_distances_and_no_range_when_it_does_not_fall():
    assert campaign.fit_path_loss([100.0, 100.0, None], [30.0, 31.0, 40.0]) is None
    assert campaign.fit_path_loss([100.0, -5.0, 200.0], [30.0, 40.0, None]) is None
    rising = campaign.fit_path_loss([10.0, 100.0], [20.0, 30.0])
    assert rising.slope_stderr_db is None  # two points leave no residual
    assert campaign.range_estimate_m(rising) is None
    assert campaign.range_estimate_m(None) is None


# --- the report -----------------------------------------------------------------------------

HOSTILE = '<script>document.title="owned"</script>'
HOSTILE_NAME = "<img src=x onerror=alert(1)>.flac"


def row(**over) -> dict:
    base = dict.fromkeys(batch.COLUMN_NAMES)
    base.update(content_hash="c" * 64, settings_hash="s" * 64, file="a.flac", path="/x",
                status="ok", text="", metadata={}, warnings=[], okdecode_version="0")
    base.update(over)
    return base


def test_text_from_recordings_and_manifests_is_escaped():
    rows = [row(file=HOSTILE_NAME, text=HOSTILE, metadata={"site": HOSTILE, HOSTILE: "x"},
                error=HOSTILE, warnings=[HOSTILE], figure='"><script>x</script>',
                status="failed")]
    page = campaign.render_report(rows, title=HOSTILE)
    assert "<script" not in page.lower()  # the report runs no script at all
    assert "<img src=x" not in page
    assert html.escape(HOSTILE_NAME) in page and html.escape(HOSTILE) in page


def test_a_report_of_nothing_measured_still_renders():
    page = campaign.render_report([row(), row(file="b.flac", status="failed", error="b.flac: "
                                                                                   "empty")])
    assert page.startswith("<!DOCTYPE html>") and page.endswith("</html>")
    assert page.count("no data to plot") == 3
    assert "<img" not in page


@pytest.fixture(scope="module")
def report_dir(tmp_path_factory) -> Path:
    """A four-recording campaign, with hostile metadata, processed with figures."""
    folder = tmp_path_factory.mktemp("rt")
    rows = []
    for i, (distance_m, cn0) in enumerate([(50, 45.0), (100, 39.0), (200, 33.0), (400, 15.0)]):
        name = f"t{i}.flac"
        synth_file(folder / name, "XQ7ZB", rate_hz=8000.0, wpm=25.0, cn0_dbhz=cn0,
                   lead_s=0.2, tail_s=0.2, seed=i)
        rows.append({"file": name, "distance_m": distance_m, "expect": "XQ7ZB",
                     "site": HOSTILE})
    with open(folder / "manifest.csv", "w", newline="", encoding="utf-8") as f:
        w = csv.DictWriter(f, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    out = folder / "out"
    summary = batch.run(folder / "manifest.csv", out, workers=1)
    assert summary.n_failed == 0
    return out


def test_the_report_is_self_contained(report_dir):
    page = (report_dir / "report.html").read_text(encoding="utf-8")
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:)?//""", page)  # nothing fetched
    assert "@import" not in page and "url(" not in page
    assert page.count('src="data:image/png;base64,') == 3
    assert "<script" not in page.lower()
    assert html.escape(HOSTILE) in page
    assert "Extrapolation." in page


PROBE = """<script>
window.addEventListener("load", () => {
  const imgs = Array.from(document.images).map(i => [i.naturalWidth, i.naturalHeight,
                                                     i.getBoundingClientRect().width]);
  document.body.setAttribute("data-probe", JSON.stringify({imgs: imgs,
    title: document.title, inner: window.innerWidth,
    scroll: document.documentElement.scrollWidth,
    rows: document.querySelectorAll("#recordings tbody tr").length}));
});
</script>"""


def chromium_probe(page: Path, tmp: Path, width: int, height: int) -> dict:
    """Load a copy of the report with a probe script in headless Chromium; its findings."""
    probe = page.with_name(f"probe-{width}.html")
    probe.write_text(page.read_text(encoding="utf-8").replace("</body>", PROBE + "</body>"),
                     encoding="utf-8")
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
           "--no-first-run", "--disable-background-networking", "--disable-component-update",
           "--disable-sync", f"--user-data-dir={tmp / f'profile-{width}'}",
           f"--window-size={width},{height}", "--virtual-time-budget=5000", "--dump-dom",
           probe.as_uri()]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=90)
    assert done.returncode == 0, done.stderr[-2000:]
    found = re.search(r'data-probe="([^"]*)"', done.stdout)
    assert found, done.stdout[-2000:]
    return json.loads(html.unescape(found.group(1)))


@pytest.mark.skipif(CHROMIUM is None, reason="headless Chromium is not installed "
                    "(Debian: apt-get install chromium; .ci/run installs it)")
@pytest.mark.parametrize(("width", "height"), [(390, 844), (1280, 900)])  # a phone, a desktop
def test_the_report_renders_in_chromium_with_its_figures(report_dir, tmp_path, width, height):
    seen = chromium_probe(report_dir / "report.html", tmp_path, width, height)
    assert len(seen["imgs"]) == 3
    for natural_w, natural_h, shown_w in seen["imgs"]:
        assert natural_w > 300 and natural_h > 200  # the embedded PNG decoded
        assert 0 < shown_w <= seen["inner"]  # and fits the window
    assert seen["rows"] == 4
    assert seen["title"] == "okdecode range test"  # no injected script ran
    # the page itself does not scroll sideways (only the table's own box may)
    assert seen["scroll"] <= seen["inner"]


@pytest.mark.skipif(CHROMIUM is None, reason="headless Chromium is not installed")
def test_the_report_screenshot_is_not_blank(report_dir, tmp_path):
    shot = tmp_path / "shot.png"
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
           "--no-first-run", "--disable-background-networking", "--disable-component-update",
           "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}",
           f"--screenshot={shot}", "--window-size=1000,1400",
           (report_dir / "report.html").as_uri()]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=90)
    assert done.returncode == 0 and shot.exists(), done.stderr[-2000:]
    import matplotlib.image

    pixels = matplotlib.image.imread(shot)
    assert pixels.shape[:2] == (1400, 1000)
    assert pixels[..., :3].std() > 0.05  # text and plots, not an empty page


def test_the_summary_counts_the_received_and_the_furthest(report_dir):
    with batch.Store(report_dir / "results.sqlite") as store:
        rows = store.rows()
    s = campaign.summarise(rows)
    # made at 45, 39, 33 and 15 dB-Hz: the decoding threshold lies between the last two
    assert [r["received"] for r in rows] == [True, True, True, False]
    assert (s["n_received"], s["n_verified"], s["furthest_received_m"]) == (3, 4, 200.0)
    assert s["fit"].n_points == sum(r["cn0_dbhz"] is not None for r in rows)
    page = (report_dir / "report.html").read_text(encoding="utf-8")
    assert "<b>3 of 4</b>" in page and "<b>200 m</b>" in page


def test_each_recording_links_to_its_figure(report_dir):
    page = (report_dir / "report.html").read_text(encoding="utf-8")
    with batch.Store(report_dir / "results.sqlite") as store:
        rows = store.rows()
    if batch.importlib.util.find_spec("okdecode.plot") is None:
        pytest.skip("okdecode.plot is not there: no figures per recording")
    for r in rows:
        assert r["figure"] and (report_dir / r["figure"]).stat().st_size > 0
        assert f'href="{html.escape(r["figure"])}"' in page


def test_the_range_estimate_aims_at_the_limit_of_the_decoders_used():
    # measured limits (bench/sensitivity.py): the sequence decoder's is the lower one
    limits = campaign.DECODING_LIMIT_DBHZ
    assert limits["sequence"] < limits["threshold"]
    assert campaign.decoding_limit_dbhz([{"decoder": "sequence"}]) == limits["sequence"]
    # a campaign with both takes the less sensitive one's limit
    mixed = [{"decoder": "sequence"}, {"decoder": "threshold"}]
    assert campaign.decoding_limit_dbhz(mixed) == limits["threshold"]
    fit = campaign.fit_path_loss([10.0, 100.0, 1000.0], [60.0, 40.0, 20.0])
    # C/N0 = 80 - 20 log10(d): the distance where it meets the limit
    assert campaign.range_estimate_m(fit, limits["sequence"]) == pytest.approx(
        10 ** ((80.0 - limits["sequence"]) / 20.0))
