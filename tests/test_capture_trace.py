"""Trace reader: sniffed layouts, rates, channels, line-numbered errors, fuzzing, decoding."""

from __future__ import annotations

import io
import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from okdecode.capture import open_capture, trace
from okdecode.capture.trace import read_trace
from okdecode.errors import CaptureError, ParameterError


def _samples(cap) -> np.ndarray:
    return np.concatenate(list(cap.blocks()))


def _write(tmp_path: Path, name: str, text: str, encoding: str = "utf-8") -> Path:
    path = tmp_path / name
    path.write_bytes(text.encode(encoding))
    return path


def _table(n: int, rng: np.random.Generator, *, dt_s: float = 1e-6) -> tuple[np.ndarray, ...]:
    t = np.arange(n) * dt_s
    return t, np.round(rng.normal(size=n), 4), np.round(rng.normal(size=n), 4)


# ---------------------------------------------------------------------------------------
# Layouts an oscilloscope or logger writes


def test_comma_separated_with_time_column(tmp_path, rng):
    t, a, b = _table(50, rng)
    body = "".join(f"{x:.6e},{y:.4f},{z:.4f}\n" for x, y, z in zip(t, a, b, strict=True))
    path = _write(tmp_path, "run07.csv", "Time (s),CH1,CH2\n" + body)
    cap = open_capture(path)
    assert cap.kind == "trace" and cap.channel_names == ("CH1", "CH2")
    assert cap.rate_hz == pytest.approx(1e6, rel=1e-9)
    np.testing.assert_allclose(_samples(cap), np.c_[a, b], atol=1e-6)  # float32 of 4 decimals


def test_semicolons_decimal_commas_quoted_header_and_metadata(tmp_path, rng):
    t, a, b = _table(40, rng, dt_s=1e-3)
    meta = 'Model;XQ-100\nSerial;0042\n"Sample Interval";"0,001";"s"\n\n'
    header = '"Time (ms)";"CH1 (V)";"CH2 (V)"\n'
    body = "".join(f"{x * 1e3:.3f};{y:.4f};{z:.4f}\n".replace(".", ",")
                   for x, y, z in zip(t, a, b, strict=True))
    cap = open_capture(_write(tmp_path, "scope.csv", meta + header + body))
    # the time column is in ms, as its header says: 1 ms steps are 1 kHz
    assert cap.rate_hz == pytest.approx(1000.0, rel=1e-9)
    assert cap.channel_names == ("CH1 (V)", "CH2 (V)")
    np.testing.assert_allclose(_samples(cap), np.c_[a, b], atol=1e-6)
    assert "decimal commas" in cap.notes[0] and "3 metadata line(s)" in cap.notes[0]


def test_all_quoted_fields_with_decimal_commas_and_comma_separators(tmp_path, rng):
    t, a, _ = _table(30, rng)
    body = "".join(f'"{x * 1e6:.1f}","{y:.4f}"\n'.replace(".", ",", 1).replace(".", ",")
                   for x, y in zip(t, a, strict=True))
    # each field is quoted: "0,0","1,2345" -> two fields with decimal commas
    cap = open_capture(_write(tmp_path, "q.csv", '"Time [us]","Volt"\n' + body))
    assert cap.rate_hz == pytest.approx(1e6, rel=1e-9)
    np.testing.assert_allclose(_samples(cap)[:, 0], a, atol=1e-6)


def test_tabs_and_a_units_row(tmp_path, rng):
    t, a, b = _table(30, rng, dt_s=2e-7)
    head = "x-axis\t1\t2\nsecond\tVolt\tVolt\n"
    body = "".join(f"{x:.4e}\t{y:.4f}\t{z:.4f}\r\n" for x, y, z in zip(t, a, b, strict=True))
    cap = open_capture(_write(tmp_path, "ch12.csv", head + body))
    assert cap.rate_hz == pytest.approx(5e6, rel=1e-6)
    assert cap.channel_names == ("1", "2")
    np.testing.assert_allclose(_samples(cap), np.c_[a, b], atol=1e-6)


def test_blank_separated_text_with_bom_and_trailing_blank_lines(tmp_path, rng):
    t, a, _ = _table(25, rng, dt_s=1e-4)
    body = "".join(f"  {x:.5f}   {y: .4f}\n" for x, y in zip(t, a, strict=True))
    path = _write(tmp_path, "log.txt", "\ufefftime v\n" + body + "\n\n")
    cap = open_capture(path)
    assert cap.rate_hz == pytest.approx(1e4, rel=1e-9)
    np.testing.assert_allclose(_samples(cap)[:, 0], a, atol=1e-6)


def test_trailing_separators_and_utf16(tmp_path, rng):
    t, a, _ = _table(20, rng)
    text = "Time,CH1,\n" + "".join(f"{x:.7f},{y:.4f},\n" for x, y in zip(t, a, strict=True))
    cap = open_capture(_write(tmp_path, "w.csv", "\ufeff" + text, encoding="utf-16"))
    assert cap.n_channels == 1 and cap.rate_hz == pytest.approx(1e6, rel=1e-6)
    np.testing.assert_allclose(_samples(cap)[:, 0], a, atol=1e-6)


def test_sample_interval_line_gives_the_rate(tmp_path, rng):
    a = np.round(rng.normal(size=20), 3)
    text = "Sample Interval: 0.5 us\nRecord Length: 20\nCH1\n" + "".join(f"{y}\n" for y in a)
    cap = open_capture(_write(tmp_path, "int.txt", text))
    assert cap.rate_hz == pytest.approx(2e6, rel=1e-12)
    assert any("Sample Interval" in n for n in cap.notes)


@pytest.mark.parametrize(("line", "rate_hz"), [("Sample Rate,10 MSa/s", 1e7),
                                               ("Sampling frequency = 48 kHz", 48e3),
                                               ("X Increment,1.0E-07", 1e7)])
def test_sample_rate_lines(line, rate_hz, tmp_path):
    text = line + "\nCH1\n" + "".join(f"{v}\n" for v in range(10))
    assert open_capture(_write(tmp_path, "r.csv", text)).rate_hz == pytest.approx(rate_hz)


def test_headerless_rising_first_column_is_time(tmp_path, rng):
    t, a, _ = _table(20, rng, dt_s=1e-3)
    text = "".join(f"{x:.3f},{y:.4f}\n" for x, y in zip(t, a, strict=True))
    cap = open_capture(_write(tmp_path, "plain.csv", text))
    assert cap.rate_hz == pytest.approx(1000.0) and cap.n_channels == 1
    assert any("taken as time in seconds" in n for n in cap.notes)


def test_each_input_kind_reads_the_same(tmp_path, rng):
    t, a, _ = _table(20, rng)
    text = "Time,V\n" + "".join(f"{x:.7f},{y:.4f}\n" for x, y in zip(t, a, strict=True))
    path = _write(tmp_path, "k.csv", text)
    caps = [read_trace(str(path)), read_trace(path), read_trace(io.StringIO(text)),
            read_trace(io.BytesIO(text.encode()), source="k.csv")]
    for cap in caps:
        np.testing.assert_array_equal(_samples(cap), _samples(caps[0]))
        assert cap.rate_hz == caps[0].rate_hz
    assert caps[2].source == "<stream>" and caps[3].source == "k.csv"


@pytest.mark.parametrize("chunk_bytes", [16, 37, 100, 1 << 20])
def test_chunk_boundaries_do_not_matter(chunk_bytes, tmp_path, rng, monkeypatch):
    t, a, b = _table(300, rng)
    text = "Time,A,B\n" + "".join(f"{x:.7f},{y:.4f},{z:.4f}\n"
                                  for x, y, z in zip(t, a, b, strict=True))
    path = _write(tmp_path, "c.csv", text)
    whole = _samples(open_capture(path))
    monkeypatch.setattr(trace, "CHUNK_BYTES", chunk_bytes)
    np.testing.assert_array_equal(_samples(open_capture(path)), whole)


def test_large_trace_spills_to_a_temporary_file(tmp_path, rng, monkeypatch):
    t, a, b = _table(5000, rng)
    text = "Time,A,B\n" + "".join(f"{x:.7f},{y:.4f},{z:.4f}\n"
                                  for x, y, z in zip(t, a, b, strict=True))
    path = _write(tmp_path, "s.csv", text)
    in_memory = _samples(open_capture(path))
    monkeypatch.setattr(trace, "SPILL_BYTES", 4096)
    monkeypatch.setattr(trace, "CHUNK_BYTES", 1000)
    cap = open_capture(path)
    assert np.concatenate(list(cap.blocks(333))).shape == (5000, 2)
    np.testing.assert_array_equal(_samples(cap), in_memory)


def test_fast_path_and_line_by_line_parse_agree(rng):
    lines = [f"{rng.normal():.6e};{rng.integers(-999, 999)};{rng.uniform():.3f}"
             for _ in range(200)]
    chunk = ("\n".join(lines) + "\n").encode()
    layout = trace.sniff(b"a;b;c\n" + chunk, at_eof=True, source="x")
    fast = trace._fast_parse(chunk, layout, chunk.count(b"\n"))
    slow, line_no = trace._parse_lines(chunk, layout, layout.data_line, source="x")
    assert fast is not None
    np.testing.assert_array_equal(fast, slow)
    np.testing.assert_array_equal(line_no, np.arange(2, 202))


# ---------------------------------------------------------------------------------------
# Rates, time stamps and channels


def test_repeated_time_stamps_are_said(tmp_path, rng):
    # time printed with too few digits: 0.0000, 0.0000, 0.0001, 0.0001, ... at 20 kHz
    t = np.arange(40) * 5e-5
    text = "Time,V\n" + "".join(f"{x:.4f},{v:.3f}\n" for x, v in zip(t, rng.normal(size=40),
                                                                     strict=True))
    cap = open_capture(_write(tmp_path, "rep.csv", text))
    assert any("repeat" in n for n in cap.notes)
    # the rate comes from the first and last stamps as printed: 39 steps between them
    assert cap.rate_hz == pytest.approx(39 / float(f"{t[-1]:.4f}"), rel=1e-9)


def test_non_uniform_time_stamps_are_said(tmp_path):
    t = np.r_[np.arange(20), np.arange(25, 45)] * 1e-3  # a gap of 5 samples
    text = "Time,V\n" + "".join(f"{x:.3f},1\n" for x in t)
    cap = open_capture(_write(tmp_path, "gap.csv", text))
    assert any("not uniform" in n for n in cap.notes)


def test_given_rate_wins_and_a_disagreement_is_said(tmp_path):
    text = "Time,V\n" + "".join(f"{i * 1e-3:.3f},{i % 3}\n" for i in range(10))
    cap = open_capture(_write(tmp_path, "r.csv", text), rate_hz=2000.0)
    assert cap.rate_hz == 2000.0
    assert any("time column says 1000 Hz" in n for n in cap.notes)


def test_channels_by_name_and_index(tmp_path, rng):
    t, a, b = _table(20, rng)
    text = "Index,Time (us),CH1 (V),CH2 (V)\n" + "".join(
        f"{i},{x * 1e6:.1f},{y:.4f},{z:.4f}\n" for i, (x, y, z) in enumerate(zip(t, a, b,
                                                                              strict=True)))
    path = _write(tmp_path, "ch.csv", text)
    assert open_capture(path).channel_names == ("CH1 (V)", "CH2 (V)")  # index column skipped
    by_name = open_capture(path, columns="ch2")
    np.testing.assert_allclose(_samples(by_name)[:, 0], b, atol=1e-6)
    by_index = open_capture(path, columns=[1, 0])
    assert by_index.channel_names == ("CH2 (V)", "CH1 (V)")
    np.testing.assert_allclose(_samples(by_index), np.c_[b, a], atol=1e-6)
    with pytest.raises(ParameterError, match=rf"^{path}: no column named 'CH9'"):
        open_capture(path, columns="CH9")
    with pytest.raises(ParameterError, match=rf"^{path}: column index 2 does not exist"):
        open_capture(path, columns=2)


# ---------------------------------------------------------------------------------------
# Bad input: one clear error naming the file


def test_non_numeric_row_in_the_middle_names_its_line(tmp_path):
    rows = [f"{i * 1e-3:.3f},{i % 7}" for i in range(100)]
    rows[57] = "0.057,n/a"
    path = _write(tmp_path, "run07.csv", "Time,CH1\n" + "\n".join(rows) + "\n")
    # the header is line 1, so data row 57 (from 0) is line 59
    with pytest.raises(CaptureError, match=rf"^{path}: line 59, column 'CH1' is 'n/a'; "
                                           "expected a number$"):
        open_capture(path)


def test_non_numeric_row_far_into_a_large_trace(tmp_path, monkeypatch):
    monkeypatch.setattr(trace, "CHUNK_BYTES", 4096)  # the bad row in a later chunk
    rows = [f"{i * 1e-6:.6f},{i % 5}" for i in range(20000)]
    rows[15321] = "0.015321,1.2.3"
    path = _write(tmp_path, "big.csv", "Time,CH1\n" + "\n".join(rows) + "\n")
    with pytest.raises(CaptureError, match=rf"^{path}: line 15323, column 'CH1' is '1.2.3'"):
        open_capture(path)


def test_row_with_a_missing_field(tmp_path):
    rows = ["0,1", "1,2", "2", "3,4"]
    path = _write(tmp_path, "m.csv", "Time,CH1\n" + "\n".join(rows) + "\n")
    with pytest.raises(CaptureError, match=rf"^{path}: line 4 has 1 field\(s\); expected 2"):
        open_capture(path)


def test_a_single_row(tmp_path):
    path = _write(tmp_path, "one.csv", "Time (s),CH1\n0.0,0.25\n")
    with pytest.raises(CaptureError, match=rf"^{path}: only one data row"):
        open_capture(path)


def test_header_without_rows(tmp_path):
    path = _write(tmp_path, "none.csv", "Time (s),CH1\n")
    with pytest.raises(CaptureError, match=rf"^{path}: no rows of numbers"):
        open_capture(path)


def test_time_going_backwards_names_its_line(tmp_path):
    rows = [f"{t:.4f},{i}" for i, t in enumerate([0.0, 0.001, 0.002, 0.0015, 0.004])]
    path = _write(tmp_path, "back.csv", "Time,CH1\n" + "\n".join(rows) + "\n")
    with pytest.raises(CaptureError, match=rf"^{path}: line 5: time goes backwards"):
        open_capture(path)


def test_no_rate_anywhere_says_pass_rate(tmp_path):
    path = _write(tmp_path, "v.csv", "CH1\n" + "".join(f"{v}\n" for v in range(10)))
    with pytest.raises(CaptureError, match=rf"^{path}: .*; pass --rate HZ$"):
        open_capture(path)
    assert open_capture(path, rate_hz=500.0).rate_hz == 500.0


@pytest.mark.parametrize("value", ["nan", "inf", "-Infinity", "1e39"])
def test_non_finite_or_huge_values_name_their_line(value, tmp_path):
    path = _write(tmp_path, "f.csv", f"Time,CH1\n0,1\n1,{value}\n2,3\n")
    with pytest.raises(CaptureError, match=rf"^{path}: line 3, column 'CH1' is "):
        open_capture(path)


def test_time_column_in_an_unknown_unit(tmp_path):
    path = _write(tmp_path, "u.csv", "Time (div),CH1\n0,1\n1,2\n2,3\n")
    with pytest.raises(CaptureError, match=rf"^{path}: the time column 'Time \(div\)' is in"):
        open_capture(path)


def test_binary_file_named_csv(tmp_path, rng):
    path = tmp_path / "junk.csv"
    path.write_bytes(rng.integers(0, 256, 5000, dtype=np.uint8).tobytes())
    with pytest.raises(CaptureError, match=rf"^{path}: not a text file"):
        open_capture(path)


# ---------------------------------------------------------------------------------------
# Property: arbitrary text parses or raises CaptureError, nothing else


def _check(text: str) -> None:
    try:
        cap = read_trace(io.StringIO(text), source="fuzz.csv")
    except CaptureError as err:
        assert str(err).startswith("fuzz.csv: ")
    else:
        x = _samples(cap)
        assert cap.rate_hz > 0 and math.isfinite(cap.rate_hz)
        assert x.shape == (cap.n_samples, cap.n_channels) and cap.n_samples >= 2
        assert np.isfinite(x).all()


@settings(max_examples=300)
@given(st.text())
def test_arbitrary_text_parses_or_raises_capture_error(text):
    _check(text)


_cell = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True, width=32).map(repr),
    st.integers(-10**6, 10**6).map(str),
    st.sampled_from(["", " ", "x", "n/a", '"1,5"', "1,5", "1e", "-", ".", "1.2.3", "1e400"]),
)
_row = st.lists(_cell, min_size=1, max_size=4)


@settings(max_examples=300)
@given(header=st.sampled_from(["", "Time,CH1\n", "Time (ms);CH1\n", "t\tV\n", "CH1\n",
                               "Sample Interval,1e-6\nCH1,CH2\n"]),
       rows=st.lists(_row, min_size=0, max_size=12),
       sep=st.sampled_from([",", ";", "\t", " "]),
       end=st.sampled_from(["\n", "\r\n"]))
def test_table_like_text_parses_or_raises_capture_error(header, rows, sep, end):
    _check(header + "".join(sep.join(r) + end for r in rows))


# ---------------------------------------------------------------------------------------
# Decoding traces


def test_audio_rate_trace_decodes(tmp_path):
    from okdecode.receiver import decode_file
    from okdecode.synth import synth

    rec = synth("XQ7ZB", wpm=22, carrier_hz=700.0, rate_hz=8000.0, cn0_dbhz=40.0, seed=5)
    t = np.arange(rec.samples.size) / rec.rate_hz
    # a logger's export: semicolons, decimal commas, a time column in ms
    body = "".join(f"{x * 1e3:.4f};{v:.5f}\n".replace(".", ",")
                   for x, v in zip(t, rec.samples, strict=True))
    path = _write(tmp_path, "logger.csv", "Logger XQ-7\nTime (ms);Level\n" + body)
    result = decode_file(path)
    assert result.text == rec.truth.text
    assert abs(result.carrier_hz - 700.0) < 5.0


def test_rf_trace_of_an_lc_tank_decodes_with_its_carrier(tmp_path):
    """A carrier at the resonance of 12 uH and 1.0 nF, sampled at 10 MS/s by a scope."""
    from okdecode.receiver import decode_capture
    from okdecode.synth import key

    # handbook relation for the resonance of an LC tank: f = 1 / (2 pi sqrt(L C)), here
    # 1 / (2 pi sqrt(12e-6 H * 1.0e-9 F)) = 1.4529 MHz (ARRL Handbook, "Resonance")
    carrier_hz = 1.0 / (2 * math.pi * math.sqrt(12e-6 * 1.0e-9))
    assert carrier_hz == pytest.approx(1.453e6, rel=1e-3)
    rate_hz = 10e6
    keying = key("XQ7", wpm=25, start_s=0.1)
    n = int((keying.end_s[-1] + 0.1) * rate_hz)  # 2.3 s
    rng = np.random.default_rng(1453)
    volts = rng.standard_normal(n, dtype=np.float32) * np.float32(0.15)
    step_rad = 2 * math.pi * carrier_hz / rate_hz
    for a, b in zip(keying.start_s, keying.end_s, strict=True):  # key down: the carrier
        i0, i1 = int(a * rate_hz), int(b * rate_hz)
        volts[i0:i1] += (0.4 * np.cos(step_rad * np.arange(i0, i1))).astype(np.float32)
    # an 8-bit scope: codes of 10 mV (peaks near 115, none clipped), written as integers
    # through a lookup table
    codes = np.clip(np.rint(volts * 100), -127, 127).astype(np.int16) + 128
    table = np.array([f"{v:4d}\n".encode() for v in range(-128, 128)], dtype="S5")
    body = table.view(np.uint8).reshape(256, 5)[codes].tobytes()
    path = tmp_path / "tank.csv"
    path.write_bytes(b"Model,XQ-SCOPE\nSample Interval,1.0E-07,s\nCH1\n" + body)
    cap = open_capture(path)
    assert cap.rate_hz == pytest.approx(rate_hz) and cap.n_samples == n
    result = decode_capture(cap)
    assert result.text == "XQ7"
    assert abs(result.carrier_hz - carrier_hz) < 1e3  # issue 3: within 1 kHz
