"""Tests of okdecode.plot: figures of receptions, checked on the Figure object, not pixels."""

from __future__ import annotations

import dataclasses
import io
import json
import tracemalloc

import numpy as np
import pytest

from okdecode import plot, report
from okdecode.errors import ParameterError
from okdecode.receiver import decode_array, decode_file
from okdecode.synth import Station, synth, synth_file
from okdecode.text import PLACEHOLDER, canonical

# M. Okabe and K. Ito, "Color Universal Design" (J*FLY, 2002): the eight colours of their
# palette, distinguishable with the common colour-vision deficiencies, and a neutral grey
OKABE_ITO = {"#000000", "#e69f00", "#56b4e9", "#009e73", "#f0e442", "#0072b2", "#d55e00",
             "#cc79a7", "#999999"}


def axes_titled(fig, prefix: str):
    found = [ax for ax in fig.axes if ax.get_title(loc="left").startswith(prefix)]
    assert found, f"no panel titled {prefix!r}"
    return found


def character_texts(ax) -> list:
    return [t for t in ax.texts if t.get_gid() == "character"]


def all_texts(fig) -> str:
    parts = [fig._suptitle.get_text() if fig._suptitle is not None else ""]
    for ax in fig.axes:
        parts += [t.get_text() for t in ax.texts]
    return "\n".join(parts)


def check_labels(fig) -> None:
    """Every panel that draws data names both axes, with a unit or a count."""
    for prefix, x_unit, y_unit in [
        ("carrier search", "Hz", "dBFS"),
        ("around the carrier", "Hz", "dB"),
        ("mark lengths", "dots", "marks"),
        ("space lengths", "dots", "spaces"),
        ("spectrogram", "", "Hz"),
        ("envelope", ", s", "full scale"),
    ]:
        for ax in axes_titled(fig, prefix):
            if not ax.axison:
                continue
            assert x_unit in ax.get_xlabel(), (prefix, ax.get_xlabel())
            assert y_unit in ax.get_ylabel(), (prefix, ax.get_ylabel())


def check_palette(fig) -> None:
    from matplotlib.colors import to_hex

    for ax in fig.axes:
        if ax.get_label() == "<colorbar>":  # the colour map's own scale
            continue
        for line in ax.get_lines():
            assert to_hex(line.get_color()) in OKABE_ITO, line.get_label()
        for coll in ax.collections:
            for rgba in np.atleast_2d(coll.get_facecolor()):
                if rgba.size and rgba[3] > 0:
                    assert to_hex(rgba[:3]) in OKABE_ITO, coll.get_label()


# ---------------------------------------------------------------------------------------


def test_audio_figure_shows_carrier_interferer_characters_and_timing(tmp_path):
    path = tmp_path / "ridge_a.flac"
    truth = synth_file(path, "CQ DE XQ7ZB XQ7ZB K", rate_hz=8000.0, carrier_hz=700.0,
                       cn0_dbhz=40.0, wpm=20.0, seed=4,
                       stations=(Station(carrier_hz=1500.0, level_db=-6.0,
                                         message="QX9A QX9A", wpm=15.0),))
    result = decode_file(path)
    assert result.text == canonical("CQ DE XQ7ZB XQ7ZB K")
    fig = plot.plot_reception(result)
    fig.savefig(tmp_path / "ridge_a.png", dpi=100)
    assert (tmp_path / "ridge_a.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # RFC 2083
    check_labels(fig)
    check_palette(fig)
    title = fig._suptitle.get_text()
    assert "ridge_a.flac" in title
    assert f"C/N0 {result.cn0_dbhz:.1f} dB-Hz" in title
    assert f"{result.wpm:.1f} WPM" in title
    assert result.text in title
    # a short recording: the characters are written on the overview, one per character
    # the generator sent, in order, each above its own marks
    (env,) = axes_titled(fig, "envelope")
    texts = character_texts(env)
    assert [t.get_text() for t in texts] == list(truth.keying.chars)
    for t, c in zip(texts, result.characters, strict=True):
        assert c.start_s <= t.get_position()[0] <= c.end_s
    # the other station is a keyed carrier the receiver did not decode, marked as such
    (search,) = axes_titled(fig, "carrier search")
    rejected = [t.get_text() for t in search.texts if t.get_gid() == "interferer"]
    assert any(abs(float(s.split()[0].replace(",", "")) - 1500.0) < 40.0 for s in rejected)
    # the decoded carrier is drawn where it was found
    xs = [line.get_xdata() for line in search.get_lines() if "decoded carrier" in
          line.get_label()]
    assert xs and abs(xs[0][0] - result.carrier_hz) < 1e-6
    # timing box: the measured ratio and jitter, as the report gives them
    (marks_ax,) = axes_titled(fig, "mark lengths")
    box = next(t.get_text() for t in marks_ax.texts if t.get_gid() == "timing")
    assert f"dash/dot {result.timing.dash_dot_ratio:.2f}" in box
    assert f"jitter {result.timing.jitter_ms:.1f} ms" in box
    # ITU-R M.1677-1 (2009): marks of 1 and 3 units, spaces of 1, 3 and 7 units
    (spaces_ax,) = axes_titled(fig, "space lengths")
    marked = {round(float(line.get_xdata()[0]), 6) for line in spaces_ax.get_lines()}
    assert {1.0, 3.0, 7.0} <= marked
    marked = {round(float(line.get_xdata()[0]), 6) for line in marks_ax.get_lines()}
    assert {1.0, 3.0} <= marked
    # the histograms count every mark and every space between them
    counted = sum(p.get_height() for p in marks_ax.patches)
    assert counted == result.symbols.n_marks


def test_iq_figure_with_and_without_the_carrier_search(tmp_path):
    center_hz = 7.03e6
    rec = synth("XQ7ZB TEST 73", rate_hz=48000.0, iq=True, carrier_hz=-3000.0, cn0_dbhz=40.0,
                wpm=25.0, seed=5)
    result = decode_array(rec.samples, rec.rate_hz, center_hz=center_hz, source="site3.cf32")
    assert result.text == rec.truth.text
    fig = plot.plot_reception(result)
    check_labels(fig)
    (search,) = axes_titled(fig, "carrier search")
    # at RF the axis counts from a stated reference, so its ticks stay readable
    assert "from 7,027,000" in search.get_xlabel()
    (env,) = axes_titled(fig, "envelope")
    assert [t.get_text() for t in character_texts(env)] == list(rec.truth.keying.chars)
    fig.savefig(tmp_path / "site3.svg")
    assert b"<svg" in (tmp_path / "site3.svg").read_bytes()[:2000]

    # the carrier given: no search spectrum, so the spectrum comes from the baseband alone
    given = decode_array(rec.samples, rec.rate_hz, center_hz=center_hz, source="site3.cf32",
                         carrier_hz=center_hz - 3000.0)
    assert given.spectrum is None
    fig = plot.plot_reception(given)
    (search,) = axes_titled(fig, "carrier search")
    assert "carrier was given" in " ".join(t.get_text() for t in search.texts)
    (fine,) = axes_titled(fig, "around the carrier")
    (line,) = [ln for ln in fine.get_lines() if ln.get_gid() == "welch"]
    freq, db = line.get_xdata(), line.get_ydata()
    # the Welch spectrum peaks at the carrier, inside the detection band
    assert abs(freq[np.argmax(db)]) <= given.level.snr_bandwidth_hz / 2
    plot.write_figure(given, tmp_path / "site3.pdf")
    assert (tmp_path / "site3.pdf").read_bytes()[:5] == b"%PDF-"  # ISO 32000 file header


def trace_like(rate_hz: float = 50000.0):
    """An oscilloscope-style capture: a 5 kHz keyed carrier in volts, with a DC offset."""
    rec = synth("XQ7ZB", rate_hz=rate_hz, carrier_hz=5000.0, cn0_dbhz=45.0, wpm=30.0,
                lead_s=0.2, tail_s=0.2, seed=6)
    volts = 0.4 * rec.samples + 0.05
    time_s = np.arange(volts.size) / rate_hz
    return time_s, volts, rec.truth


def test_trace_like_samples_figure():
    time_s, volts, truth = trace_like()
    result = decode_array(volts, 1.0 / (time_s[1] - time_s[0]), source="scope_ch1.csv")
    assert result.text == truth.text
    fig = plot.plot_reception(result)
    check_labels(fig)
    (env,) = axes_titled(fig, "envelope")
    assert [t.get_text() for t in character_texts(env)] == list(truth.keying.chars)
    fig.savefig(io.BytesIO(), format="png")


def test_csv_trace_figure(tmp_path):
    time_s, volts, truth = trace_like()
    path = tmp_path / "scope_ch1.csv"
    np.savetxt(path, np.column_stack([time_s, volts]), delimiter=",", fmt="%.9g",
               header="time,voltage", comments="")
    result = decode_file(path)
    assert result.text == truth.text
    out = plot.write_figure(result, tmp_path / "scope_ch1.png")
    fig = plot.plot_reception(result)
    assert "scope_ch1.csv" in fig._suptitle.get_text()
    (env,) = axes_titled(fig, "envelope")
    assert [t.get_text() for t in character_texts(env)] == list(truth.keying.chars)
    assert out.stat().st_size > 0


def test_no_signal_figure_says_so(tmp_path):
    rec = synth("", rate_hz=8000.0, duration_s=6.0, cn0_dbhz=40.0, seed=7)
    result = decode_array(rec.samples, rec.rate_hz, source="quiet.wav")
    assert result.text == ""
    fig = plot.plot_reception(result)
    said = [t.get_text() for ax in fig.axes for t in ax.texts if t.get_gid() == "no-signal"]
    assert said and all("quiet.wav: no keyed signal found" in s for s in said)
    assert "nothing decoded" in fig._suptitle.get_text()
    plot.write_figure(result, tmp_path / "quiet.png")
    assert (tmp_path / "quiet.png").stat().st_size > 0


def test_no_signal_figure_without_any_stage_result(tmp_path):
    bare = report.empty(file="blank.wav", duration_s=3.0, rate_hz=8000.0, channel=None,
                        decoder="threshold", warnings=["no keyed signal found"], notes=[])
    assert bare.envelope is None and bare.baseband is None and bare.spectrum is None
    fig = plot.plot_reception(bare)
    assert "blank.wav: no keyed signal found" in all_texts(fig)
    plot.write_figure(bare, tmp_path / "blank.svg")


def test_placeholders_stand_out(tmp_path):
    rec = synth("XQ7ZB", rate_hz=8000.0, cn0_dbhz=40.0, wpm=20.0, seed=8)
    result = decode_array(rec.samples, rec.rate_hz)
    # the plot draws whatever the decoder said: mark the third character unknown
    chars = list(result.characters)
    chars[2] = dataclasses.replace(chars[2], char=PLACEHOLDER, confidence=0.2)
    shown = dataclasses.replace(result, characters=tuple(chars), n_unknown=1)
    fig = plot.plot_reception(shown)
    (env,) = axes_titled(fig, "envelope")
    texts = character_texts(env)
    assert [t.get_text() for t in texts] == ["X", "Q", PLACEHOLDER, "Z", "B"]
    unknown, known = texts[2], [t for i, t in enumerate(texts) if i != 2]
    assert unknown.get_bbox_patch() is not None
    assert all(t.get_bbox_patch() is None for t in known)
    assert len({unknown.get_color()} | {t.get_color() for t in known}) == 2
    assert "1 unknown" in fig._suptitle.get_text()


def test_write_figure_rejects_other_formats_and_unwritable_paths(tmp_path):
    result = report.empty(file="a.wav", duration_s=1.0, rate_hz=8000.0, channel=0,
                          decoder="threshold", warnings=[], notes=[])
    with pytest.raises(ParameterError, match=r"out\.jpg: figure format '\.jpg'"):
        plot.write_figure(result, tmp_path / "out.jpg")
    with pytest.raises(ParameterError, match=r"out: figure format"):
        plot.write_figure(result, tmp_path / "out")
    with pytest.raises(ParameterError, match=r"missing[/\\]out\.png: cannot write"):
        plot.write_figure(result, tmp_path / "missing" / "out.png")


def test_transmissions_split_at_pauses():
    rec = synth("VVV DE XQ7ZB", rate_hz=4000.0, cn0_dbhz=40.0, wpm=20.0, duration_s=40.0,
                seed=9, stations=(Station(carrier_hz=700.0, message="VVV DE XQ7ZB K",
                                          wpm=20.0, start_s=20.0),))
    result = decode_array(rec.samples, rec.rate_hz)
    assert result.text == "VVV DE XQ7ZB VVV DE XQ7ZB K"
    # 10 characters, then after a pause of about 12 s (200 dots at 20 WPM) another 11
    assert plot.transmissions(result) == [(0, 10), (10, 21)]


# ---------------------------------------------------------------------------------------
# A long recording


@pytest.fixture(scope="module")
def beacon_30min():
    """A 30-minute beacon at 4 kHz: a long message, then a short one every 600 s."""
    msg = ("VVV DE XQ7ZB XQ7ZB BEACON FIELD TEST QTH NORTH RIDGE PWR 5W ANT DIPOLE "
           "RPT SIGNAL TO XQ7ZB K")
    others = tuple(Station(carrier_hz=700.0, message=f"VVV DE XQ7ZB BEACON {k} K", wpm=20.0,
                           start_s=600.0 * k) for k in range(1, 3))
    rec = synth(msg, rate_hz=4000.0, carrier_hz=700.0, cn0_dbhz=40.0, wpm=20.0,
                duration_s=1800.0, seed=10, stations=others)
    return decode_array(rec.samples, rec.rate_hz, source="beacon_30min.flac"), msg


def test_thirty_minutes_overview_and_zooms_in_bounded_memory(beacon_30min, tmp_path):
    result, msg = beacon_30min
    # the decimated signal the reception already holds, whatever the plot does
    held_bytes = result.envelope.magnitude.nbytes + result.baseband.samples.nbytes
    assert result.envelope.magnitude.size > 100 * plot.MAX_COLUMNS  # long at any rate
    # imports and font caches are paid once per process, not per figure
    small = synth("XQ7ZB", rate_hz=4000.0, cn0_dbhz=40.0, seed=11)
    plot.plot_reception(decode_array(small.samples, small.rate_hz)).savefig(
        io.BytesIO(), format="png")
    tracemalloc.start()
    try:
        fig = plot.plot_reception(result)
        fig.savefig(tmp_path / "beacon.png", format="png", dpi=100)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    w_px, h_px = fig.get_size_inches() * 100
    canvas_bytes = 4 * w_px * h_px  # the RGBA image itself
    # generous: the figure may copy what the reception holds once and the canvas a few
    # times, but holds nothing else that grows with the recording (a line through every
    # envelope sample, or a spectrogram of every frame, would)
    print(f"30 min: plot peak {peak / 1e6:.1f} MB, held {held_bytes / 1e6:.1f} MB, "
          f"canvas {canvas_bytes / 1e6:.1f} MB")
    assert peak < held_bytes + 4 * canvas_bytes, (peak / 1e6, held_bytes / 1e6)

    check_labels(fig)
    (overview,) = axes_titled(fig, "envelope, whole recording")
    # the overview draws a bounded number of points per column, whatever the length: the
    # minimum and the maximum, each a step of two vertices
    for coll in overview.collections:
        for path in coll.get_paths():
            assert len(path.vertices) <= 4 * plot.MAX_COLUMNS + 8
    for line in overview.get_lines():
        assert len(line.get_xdata()) <= 2 * plot.MAX_COLUMNS
    # no characters on the overview; zooms of at most MAX_ZOOM_CHARS each instead
    assert not character_texts(overview)
    zooms = axes_titled(fig, "zoom ")
    assert 3 <= len(zooms) <= plot.MAX_ZOOMS
    shown = []
    for ax in zooms:
        texts = [t.get_text() for t in character_texts(ax)]
        assert 0 < len(texts) <= plot.MAX_ZOOM_CHARS
        shown.append("".join(texts))
    # every transmission has a zoom on its start, with the characters the beacon sent
    starts = [canonical(msg)[:20].replace(" ", "")] + [
        canonical(f"VVV DE XQ7ZB BEACON {k} K").replace(" ", "") for k in range(1, 3)]
    for want in starts:
        assert any(s.startswith(want) for s in shown), (want, shown)
    labels = [t.get_text() for t in overview.texts if t.get_gid() == "zoom-label"]
    assert labels == [str(k + 1) for k in range(len(zooms))]


def test_cli_plot_option_writes_one_figure_per_file(tmp_path):
    from click.testing import CliRunner

    from okdecode.cli import main

    paths = []
    for k, msg in enumerate(("XQ7ZB", "TEST XQ7ZB")):
        paths.append(tmp_path / f"site{k}.flac")
        synth_file(paths[-1], msg, rate_hz=8000.0, cn0_dbhz=40.0, wpm=25.0, seed=12 + k)
    out = tmp_path / "fig.png"
    run = CliRunner().invoke(main, ["decode", *map(str, paths), "--plot", str(out), "--json"])
    assert run.exit_code == 0, run.output
    texts = [json.loads(line)["text"] for line in run.output.splitlines()]
    assert texts == ["XQ7ZB", "TEST XQ7ZB"]
    for p in paths:
        written = tmp_path / f"fig-{p.stem}.png"
        assert written.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (RFC 2083)
    bad = CliRunner().invoke(main, ["decode", str(paths[0]), "--plot", str(tmp_path / "f.jpg")])
    assert bad.exit_code == 2
    assert "f.jpg: figure format '.jpg'" in bad.output


def test_zooms_on_one_long_transmission_cut_at_words_and_reach_its_end():
    from okdecode.text import Character

    # words of five at 20 WPM (a dot of 60 ms), no pause among them, enough for more
    # stretches than there are zooms
    n = 2 * plot.MAX_ZOOMS * plot.MAX_ZOOM_CHARS
    chars, t = [], 1.0
    for k in range(n):
        chars.append(Character(char="E", pattern=".", start_s=t, end_s=t + 0.06,
                               confidence=0.9, word_start=k % 5 == 0))
        t += 0.06 + (0.42 if k % 5 == 4 else 0.18)  # ITU-R M.1677-1: gaps of 7 and 3 dots
    bare = report.empty(file="long.wav", duration_s=t + 1.0, rate_hz=8000.0, channel=0,
                        decoder="threshold", warnings=[], notes=[])
    result = dataclasses.replace(bare, text="E" * n, characters=tuple(chars),
                                 timing=dataclasses.replace(bare.timing, unit_ms=60.0))
    fig = plot.plot_reception(result)
    spans = []
    for ax in axes_titled(fig, "zoom "):
        first, last = ax.get_title(loc="left").split("characters ")[1].split(" of ")[0].split(
            " to ")
        spans.append((int(first) - 1, int(last)))
    assert len(spans) == plot.MAX_ZOOMS
    assert spans[0][0] == 0 and spans[-1][1] == n
    for a, b in spans:
        assert 0 < b - a <= plot.MAX_ZOOM_CHARS
        assert chars[a].word_start


def test_steady_carrier_is_marked_as_rejected():
    # a steady, unkeyed carrier is not a message (issue 2); the figure shows where it was
    rec = synth("", rate_hz=8000.0, cn0_dbhz=40.0, duration_s=5.0, seed=13, amplitude=0.1,
                stations=(Station(carrier_hz=1500.0, message=None),))
    result = decode_array(rec.samples, rec.rate_hz, source="steady.wav")
    assert result.text == ""
    fig = plot.plot_reception(result)
    (search,) = axes_titled(fig, "carrier search")
    steady = [float(t.get_text().split()[0].replace(",", "")) for t in search.texts
              if t.get_gid() == "steady"]
    # within one search bin of the generator's frequency
    assert any(abs(f - 1500.0) <= result.spectrum.bin_hz for f in steady), steady
    assert "steady.wav: no keyed signal found" in all_texts(fig)


def test_title_carries_the_other_stages_figures():
    bare = report.empty(file="spark.wav", duration_s=3.0, rate_hz=8000.0, channel=0,
                        decoder="threshold", warnings=[], notes=[])
    result = dataclasses.replace(bare, extra={"spark_rate_hz": 612.0, "ringing_hz": 1.453e6,
                                              "unmeasured_hz": None})
    title = plot.plot_reception(result)._suptitle.get_text()
    assert "spark rate 612.0 Hz" in title and "ringing 1,453,000.0 Hz" in title
    assert "unmeasured" not in title
