"""The okdecode command line: the JSON contract, JSON Lines, and one line per bad input."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
import soundfile
from click.testing import CliRunner

from okdecode.cli import main
from okdecode.synth import synth_file

# issue 2, "Interface": keys every JSON object carries
CONTRACT = {"file", "text", "carrier_hz", "wpm", "cn0_dbhz", "snr_db", "snr_bandwidth_hz",
            "duration_s", "timing", "characters", "warnings"}
TIMING = {"dot_ms", "dash_ms", "dash_dot_ratio", "element_gap_ms", "char_gap_ms",
          "word_gap_ms", "jitter_ms"}
CHARACTER = {"char", "start_s", "end_s", "confidence"}


def run(*args: str):
    return CliRunner().invoke(main, list(args))


@pytest.fixture(scope="module")
def good(tmp_path_factory):
    """Two small recordings with their true texts."""
    folder = tmp_path_factory.mktemp("good")
    out = []
    for name, message, seed in (("b01.wav", "XQ7ZB TEST 73", 1), ("b02.flac", "XQ3AB DE XQ7ZB",
                                                                  2)):
        path = folder / name
        truth = synth_file(path, message, wpm=22.0, carrier_hz=720.0, cn0_dbhz=40.0, seed=seed)
        out.append((str(path), truth))
    return out


def one_error_line(result, name: str) -> str:
    lines = result.stderr.splitlines()
    assert len(lines) == 1, result.stderr  # exactly one line (issue 2), never a traceback
    assert name in lines[0]
    assert "Traceback" not in result.stderr
    return lines[0]


def test_decode_json_carries_the_contract(good):
    path, truth = good[0]
    result = run("decode", "--json", path)
    assert result.exit_code == 0, result.stderr
    lines = result.stdout.splitlines()
    assert len(lines) == 1
    d = json.loads(lines[0])
    assert set(d) >= CONTRACT
    assert set(d["timing"]) >= TIMING
    assert d["characters"] and all(set(c) >= CHARACTER for c in d["characters"])
    assert isinstance(d["warnings"], list)
    assert d["file"] == path
    assert d["text"] == truth.text
    assert "".join(c["char"] for c in d["characters"]) == truth.text.replace(" ", "")
    # PARIS = 50 units (common practice): the dot of 22 WPM is 1200 / 22 ms
    assert d["timing"]["dot_ms"] == pytest.approx(1200.0 / 22.0, rel=0.1)
    assert d["duration_s"] == pytest.approx(truth.duration_s, abs=1e-3)
    assert d["snr_db"] == pytest.approx(d["cn0_dbhz"] - 10 * np.log10(d["snr_bandwidth_hz"]),
                                        abs=0.02)  # SNR in B is C/N0 - 10 log10(B), rounded


def test_summary_without_json(good):
    path, truth = good[0]
    result = run("decode", path)
    assert result.exit_code == 0
    assert truth.text in result.stdout
    assert path in result.stdout


def test_several_files_give_json_lines_in_order(good):
    result = run("decode", "--json", *(p for p, _ in good))
    assert result.exit_code == 0, result.stderr
    lines = result.stdout.splitlines()
    assert len(lines) == len(good)
    for line, (path, truth) in zip(lines, good, strict=True):
        d = json.loads(line)
        assert d["file"] == path and d["text"] == truth.text


def test_python_dash_m_works_like_the_script(good):
    helped = subprocess.run([sys.executable, "-m", "okdecode", "--help"], capture_output=True,
                            text=True, timeout=60)
    assert helped.returncode == 0, helped.stderr
    assert "decode" in helped.stdout
    path, truth = good[0]
    decoded = subprocess.run([sys.executable, "-m", "okdecode", "decode", "--json", path],
                             capture_output=True, text=True, timeout=120)
    assert decoded.returncode == 0, decoded.stderr
    assert json.loads(decoded.stdout) == json.loads(run("decode", "--json", path).stdout)


# --- bad input ---------------------------------------------------------------------------


def write_bad(folder, kind: str):
    if kind == "empty":
        path = folder / "empty.wav"
        path.write_bytes(b"")
    elif kind.startswith("truncated"):
        path = folder / f"{kind}.wav"
        synth_file(path, "XQ7ZB", wpm=20.0, cn0_dbhz=40.0, seed=3)
        data = path.read_bytes()
        keep = {"truncated-header": 30, "truncated-half": 44 + (len(data) - 44) // 2,
                "truncated-tail": len(data) - 100}[kind]
        path.write_bytes(data[:keep])
    elif kind == "text":
        path = folder / "notes.wav"
        path.write_text("site 3, second run: key down at 14:02\n" * 20)
    elif kind == "nan":
        path = folder / "nan.wav"
        soundfile.write(str(path), np.full(8000, np.nan), 8000, subtype="FLOAT")
    elif kind == "inf":
        path = folder / "inf.wav"
        x = np.zeros(8000)
        x[4000] = np.inf
        soundfile.write(str(path), x, 8000, subtype="FLOAT")
    elif kind == "missing":
        path = folder / "missing.wav"
    else:  # pragma: no cover
        raise AssertionError(kind)
    return path


BAD = ["empty", "truncated-header", "truncated-half", "truncated-tail", "text", "nan", "inf",
       "missing"]


@pytest.mark.parametrize("kind", BAD)
def test_bad_input_exits_2_with_one_line_naming_the_file(tmp_path, kind):
    path = write_bad(tmp_path, kind)
    result = run("decode", str(path))
    assert result.exit_code == 2, (result.stdout, result.stderr)
    assert result.exception is None or isinstance(result.exception, SystemExit)
    one_error_line(result, path.name)
    assert result.stdout == ""


@pytest.mark.parametrize("options", [["--wpm", "0"], ["--wpm", "-3"], ["--carrier", "-5"],
                                     ["--carrier", "nan"], ["--channel", "7"],
                                     ["--carrier", "9000"]])
def test_absurd_options_exit_2_with_one_line(good, options):
    path, _ = good[0]  # mono, 8000 Hz
    result = run("decode", *options, path)
    assert result.exit_code == 2, (result.stdout, result.stderr)
    one_error_line(result, path)


def test_bad_file_among_good_ones_costs_only_itself(tmp_path, good):
    bad = write_bad(tmp_path, "empty")
    (p1, t1), (p2, t2) = good
    result = run("decode", "--json", p1, str(bad), p2)
    assert result.exit_code == 2
    lines = result.stdout.splitlines()
    assert [json.loads(line)["text"] for line in lines] == [t1.text, t2.text]
    assert [json.loads(line)["file"] for line in lines] == [p1, p2]
    one_error_line(result, bad.name)


def test_a_silent_recording_prints_no_numeric_warnings(tmp_path):
    # all-zero samples: every power is 0, and no log or division may complain about it
    import subprocess
    import sys

    import soundfile

    path = tmp_path / "silence.wav"
    soundfile.write(path, np.zeros(40000), 8000, subtype="PCM_16")
    out = subprocess.run([sys.executable, "-W", "error", "-m", "okdecode", "decode",
                          str(path)], capture_output=True, text=True, check=False)
    assert out.returncode == 0, out.stderr
    assert "Warning" not in out.stderr
    assert "no keyed signal found" in out.stdout
