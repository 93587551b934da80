"""Tests of okdecode.verify: alignment, error rate, copies, times, the verify command."""

from __future__ import annotations

import functools
import json

import numpy as np
import pytest
from click.testing import CliRunner
from hypothesis import given, settings
from hypothesis import strategies as st
from rapidfuzz.distance import Levenshtein

from okdecode.cli import main
from okdecode.errors import ParameterError
from okdecode.receiver import decode_array
from okdecode.synth import synth, synth_file
from okdecode.text import canonical, tokens
from okdecode.verify import (
    align,
    compare,
    count_copies,
    edit_distance,
    expected_tokens,
    verify_file,
    verify_reception,
)

REPEATABLE = settings(derandomize=True, deadline=None, max_examples=200)
SMALL = st.text(alphabet="ABE ", max_size=9)


def brute_distance(a: str, b: str) -> int:
    """Levenshtein's recursion taken literally (memoised), the reference for the DP."""

    @functools.cache
    def d(i: int, j: int) -> int:
        if i == 0 or j == 0:
            return i + j
        return min(d(i - 1, j) + 1, d(i, j - 1) + 1, d(i - 1, j - 1) + (a[i - 1] != b[j - 1]))

    return d(len(a), len(b))


@REPEATABLE
@given(SMALL, SMALL)
def test_edit_distance_equals_brute_force_and_rapidfuzz(a, b):
    # V. I. Levenshtein (1966): the recursion; rapidfuzz as a reference library
    assert edit_distance(a, b) == brute_distance(a, b) == Levenshtein.distance(a, b)
    assert align(list(a), list(b), free_ends=False).distance == brute_distance(a, b)


def _apply(expected: list[str], received: list[str], ops) -> list[str]:
    """Rebuild the matched stretch of the received tokens from the operations."""
    out = []
    for kind, i, j in ops:
        if kind in ("match", "substitution"):
            assert (expected[i] == received[j]) == (kind == "match")
            out.append(received[j])
        elif kind == "extra":
            out.append(received[j])
    return out


@REPEATABLE
@given(SMALL, st.text(alphabet="ABE ", max_size=14))
def test_best_copy_alignment_equals_best_substring(a, b):
    # P. H. Sellers (1980): the best match of a pattern in a text is the least distance
    # over all substrings; here the substrings are tried one by one
    best = min(brute_distance(a, b[i:j]) for i in range(len(b) + 1)
               for j in range(i, len(b) + 1))
    al = align(list(a), list(b))
    assert al.distance == best
    assert brute_distance(a, b[al.start : al.end]) == best
    assert _apply(list(a), list(b), al.operations) == list(b[al.start : al.end])
    assert sum(kind != "match" for kind, _, _ in al.operations) == al.distance
    assert [i for _, i, _ in al.operations if i is not None] == list(range(len(a)))


@REPEATABLE
@given(st.text(alphabet="AB", min_size=1, max_size=3), st.text(alphabet="AB", max_size=20))
def test_copies_equal_python_substring_count(a, b):
    # str.count counts non-overlapping occurrences from the left (Python reference)
    assert count_copies(list(a), list(b)) == b.count(a)


def test_prosigns_and_punctuation_are_one_token_in_canonical_spelling():
    # ITU-R M.1677-1: the cross is also the end-of-message signal <AR>; the double
    # hyphen is also <BT>
    assert expected_tokens("qrv? + 5/9, ok.") == tokens("QRV? <AR> 5/9, OK.")
    assert expected_tokens("A = B") == ["A", " ", "<BT>", " ", "B"]
    with pytest.raises(ParameterError, match=r"^<expected>: '#' has no signal"):
        expected_tokens("CQ #5")
    with pytest.raises(ParameterError, match="empty"):
        expected_tokens("   ")


@pytest.fixture(scope="module")
def clean():
    """A clear reception (C/N0 36 dB-Hz) with its truth."""
    rec = synth("CQ DE XQ7ZB = QRV? 5/9 <AR>", wpm=22, cn0_dbhz=36.0, rate_hz=8000.0, seed=4)
    return rec, decode_array(rec.samples, rec.rate_hz)


def test_exact_reception_is_received_with_one_copy(clean):
    rec, reception = clean
    assert reception.text == rec.truth.text
    v = compare(reception, "cq de xq7zb <BT> qrv? 5/9 +")
    assert v.received and v.cer == 0.0 and v.copies == 1 and not v.differences
    d = v.to_dict()
    for key in ("file", "expected", "text", "cer", "received", "copies", "differences",
                "detection"):
        assert key in d
    assert json.loads(json.dumps(d)) == d


def test_differences_have_kind_tokens_and_the_time_of_the_character(clean):
    rec, reception = clean
    keying = rec.truth.keying
    # the expected text with a letter added, a figure dropped and a letter changed
    expected = "CQ DXE XQZA = QRV? 5/9 <AR>"
    v = compare(reception, expected)
    kinds = sorted((d.kind, d.expected or "", d.received or "") for d in v.differences)
    assert kinds == [("extra", "", "7"), ("missing", "X", ""), ("substitution", "A", "B")]
    got = tokens(reception.text)
    exp = tokens(canonical(expected))
    assert v.distance == min(edit_distance(exp, got[i:j]) for i in range(len(got) + 1)
                             for j in range(i, len(got) + 1))
    assert v.cer == pytest.approx(v.distance / len(exp)) and not v.received
    sub = next(d for d in v.differences if d.kind == "substitution")
    extra = next(d for d in v.differences if d.kind == "extra")
    # times are those of the characters' first marks in the generator's truth, within a dot
    assert abs(sub.time_s - keying.char_start_s[list(keying.chars).index("B")]) < keying.dot_s
    assert abs(extra.time_s - keying.char_start_s[list(keying.chars).index("7")]) < keying.dot_s
    missing = next(d for d in v.differences if d.kind == "missing")
    # a missing character is placed at the received character it should have preceded
    assert abs(missing.time_s - keying.char_start_s[3]) < keying.dot_s  # the E of DE
    assert compare(reception, "CQ DE XQ7ZA = QRV? 5/9 <AR>", max_cer=0.05).received


def test_alternatives_pick_the_best_and_in_order_joins(clean):
    _, reception = clean
    v = verify_reception(reception, ["VVV TEST", "CQ DE XQ7ZB = QRV? 5/9 +"],
                         expect_alternatives=True, detect=False)
    assert v.received and v.expected == canonical("CQ DE XQ7ZB = QRV? 5/9 +")
    v = verify_reception(reception, ["CQ DE XQ7ZB", "= QRV? 5/9 +"], detect=False)
    assert v.received and v.expected == canonical("CQ DE XQ7ZB = QRV? 5/9 +")


def test_repeated_transmissions_count_intact_copies():
    # a beacon keys its text three times, with long pauses between
    msg = "VVV XQ7ZB"
    rec = synth(f"{msg} {msg} {msg}", wpm=25, cn0_dbhz=38.0, rate_hz=8000.0, seed=2)
    reception = decode_array(rec.samples, rec.rate_hz)
    v = compare(reception, msg)
    assert v.copies == reception.text.count(msg) == 3
    assert v.received and v.best_start_s is not None


@pytest.fixture(scope="module")
def wavs(tmp_path_factory):
    d = tmp_path_factory.mktemp("verify")
    good = d / "good.wav"
    synth_file(good, "QRV? + 5/9, OK.", wpm=20, cn0_dbhz=36.0, rate_hz=8000.0, seed=1)
    bad = d / "text.wav"
    bad.write_text("this is not audio\n")
    return d, good, bad


def test_cli_exit_status_pass_fail_and_bad_input(wavs):
    d, good, bad = wavs
    run = CliRunner().invoke
    # prosigns and punctuation on the command line, "+" the same signal as <AR>
    r = run(main, ["verify", str(good), "--expect", "QRV? <AR> 5/9, OK.", "--no-detect"])
    assert r.exit_code == 0, r.output
    assert "received" in r.output.splitlines()[0]
    r = run(main, ["verify", str(good), "--expect", "QRV? <AR> 5/8, OK.", "--no-detect"])
    assert r.exit_code == 1
    assert "NOT received" in r.output
    r = run(main, ["verify", str(good), "--expect", "QRV? <AR> 5/8, OK.", "--no-detect",
                   "--max-cer", "0.1"])
    assert r.exit_code == 0
    r = run(main, ["verify", str(bad), str(d / "missing.wav"), str(good), "--json",
                   "--expect", "QRV? + 5/9, OK.", "--no-detect"])
    assert r.exit_code == 2
    lines = [json.loads(line) for line in r.stdout.splitlines()]
    assert [x["file"] for x in lines] == [str(good)] and lines[0]["received"] is True
    errors = r.stderr.splitlines()
    assert len(errors) == 2 and str(bad) in errors[0] and "missing.wav" in errors[1]
    r = run(main, ["verify", str(good), "--expect", "CQ #1", "--no-detect"])
    assert r.exit_code == 2 and "'#' has no signal" in r.stderr


def test_cli_json_with_detection_and_expect_file(wavs):
    d, good, _ = wavs
    lines = d / "expected.txt"
    lines.write_text("QRV? +\n5/9, OK.\n")
    run = CliRunner().invoke
    r = run(main, ["verify", str(good), "--expect-file", str(lines), "--json"])
    assert r.exit_code == 0, r.output
    out = json.loads(r.stdout)
    assert out["received"] and out["copies"] == 1 and out["differences"] == []
    det = out["detection"]
    assert set(det) >= {"detected", "statistic", "false_alarm_probability", "wpm", "start_s",
                        "cn0_dbhz"}
    assert det["detected"] is True and det["false_alarm_probability"] < 1e-6
    # the generator keys the first mark at lead_s = 0.5 s at 20 WPM (dot 60 ms)
    assert abs(det["start_s"] - 0.5) < 0.06 and abs(det["wpm"] - 20.0) < 1.0
    alt = d / "alternatives.txt"
    alt.write_text("VVV TEST\nQRV? <AR> 5/9, OK.\n5/9, NO.\n")
    r = run(main, ["verify", str(good), "--expect-file", str(alt), "--alternatives",
                   "--no-detect", "--json"])
    assert r.exit_code == 0 and json.loads(r.stdout)["expected"] == canonical("QRV? + 5/9, OK.")
    alt.write_text("VVV TEST\n5/9, NO.\n")
    r = run(main, ["verify", str(good), "--expect-file", str(alt), "--alternatives",
                   "--no-detect", "--json"])
    assert r.exit_code == 1 and json.loads(r.stdout)["expected"] == "5/9, NO."
    r = run(main, ["verify", str(good), "--no-detect"])
    assert r.exit_code == 2


def test_verify_file_api_matches_decode(wavs):
    _, good, _ = wavs
    v = verify_file(good, "QRV? + 5/9, OK.", detect=False, wpm=20)
    assert v.received and v.detection is None and v.text == canonical("QRV? + 5/9, OK.")
    assert np.isclose(v.to_dict()["wpm"], 20.0, rtol=0.05)


def test_cli_weak_message_is_not_received_but_its_keying_is_found(tmp_path):
    # 17 dB-Hz: about 9 dB below where decoding reaches 5 % CER (bench_detection.py)
    weak = tmp_path / "weak.wav"
    msg = "VVV DE XQ7ZB BEACON TEST GRID KN42 73 <AR>"
    synth_file(weak, msg, wpm=20, cn0_dbhz=17.0, rate_hz=8000.0, seed=6)
    r = CliRunner().invoke(main, ["verify", str(weak), "--expect", msg])
    assert r.exit_code == 1
    assert "NOT received" in r.output and "keying    found" in r.output
    r = CliRunner().invoke(main, ["verify", str(weak), "--expect", msg, "--json"])
    det = json.loads(r.stdout)["detection"]
    assert det["detected"] and det["false_alarm_probability"] < 1e-3
    assert abs(det["wpm"] - 20.0) < 1.0 and abs(det["cn0_dbhz"] - 17.0) < 2.0
