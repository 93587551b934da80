"""Tests of stage 3 (okdecode.symbols): unit, speed, classes and Farnsworth timing."""

from __future__ import annotations

import numpy as np
import pytest

from okdecode import report
from okdecode.marks import Levels, Marks
from okdecode.symbols import CHARACTER, ELEMENT, WORD, classify, dot_s_from_wpm, farnsworth_wpm
from okdecode.synth import key
from okdecode.text import canonical, decode, runs

MESSAGE = "XQ7ZB DE XQ3AB TEST 73"


def marks_of(start_s, end_s) -> Marks:
    empty = np.empty(0)
    start_s, end_s = np.asarray(start_s, float), np.asarray(end_s, float)
    return Marks(start_s=start_s, end_s=end_s, level=np.ones(start_s.size),
                 peak_snr_db=np.full(start_s.size, 30.0),
                 levels=Levels(empty, empty, empty, empty, empty), source="<test>")


def exact_marks(message: str, *, dot_s: float, dash_units: float = 3.0,
                char_gap_s: float | None = None, word_gap_s: float | None = None):
    """Marks keyed with exact timing from the runs of okdecode.text (ITU-R M.1677-1).

    Returns the marks, the true dash flags and the true gap classes (1, 3 or 7).
    """
    t, start, end, dash, gap_class = 0.0, [], [], [], []
    gap_s = {1: dot_s, 3: char_gap_s or 3 * dot_s, 7: word_gap_s or 7 * dot_s}
    for r in runs(message):
        if r.key_down:
            length = dot_s if r.units == 1 else dash_units * dot_s
            start.append(t)
            end.append(t + length)
            dash.append(r.units == 3)
            t += length
        else:
            gap_class.append(r.units)
            t += gap_s[r.units]
    return marks_of(start, end), np.array(dash), np.array(gap_class)


@pytest.mark.parametrize("wpm", [5.0, 8.0, 12.0, 18.0, 25.0, 35.0, 50.0])
def test_exact_timing_gives_the_exact_unit_and_classes(wpm):
    dot_s = 1.2 / wpm  # PARIS = 50 units (common practice)
    marks, dash, gaps = exact_marks(MESSAGE, dot_s=dot_s)
    syms = classify(marks)
    assert syms.dot_s == pytest.approx(dot_s, rel=1e-9)
    assert syms.wpm == pytest.approx(wpm, rel=1e-9)
    np.testing.assert_array_equal(syms.is_dash, dash)
    # ITU-R M.1677-1 (2009): gaps of 1, 3 and 7 units
    np.testing.assert_array_equal(syms.gap_class, gaps)
    assert set(np.unique(syms.gap_class)) <= {ELEMENT, CHARACTER, WORD}
    assert syms.farnsworth is False and syms.farnsworth_wpm is None
    assert syms.dash_dot_ratio == pytest.approx(3.0, rel=1e-9)
    assert np.allclose(syms.local_dot_s, dot_s, rtol=1e-9)
    assert decode(syms).text == canonical(MESSAGE)


@pytest.mark.parametrize("wpm", [6.0, 20.0, 45.0])
def test_given_speed_gives_the_same_unit(wpm):
    marks, dash, _ = exact_marks(MESSAGE, dot_s=1.2 / wpm)
    syms = classify(marks, wpm=wpm)
    assert syms.dot_s == pytest.approx(dot_s_from_wpm(wpm), rel=1e-9)
    np.testing.assert_array_equal(syms.is_dash, dash)


@pytest.mark.parametrize("ratio", [2.5, 3.0, 3.5, 4.0])
def test_dash_dot_ratio(ratio):
    dot_s = 0.06
    marks, dash, _ = exact_marks(MESSAGE, dot_s=dot_s, dash_units=ratio)
    syms = classify(marks)
    # exact lengths: every dot dot_s, every dash ratio * dot_s (numpy arithmetic)
    assert syms.dash_dot_ratio == pytest.approx(ratio, rel=1e-9)
    assert syms.dot_s == pytest.approx(dot_s, rel=1e-9)
    np.testing.assert_array_equal(syms.is_dash, dash)
    t = report.timing(syms)
    assert t.dot_ms == pytest.approx(1e3 * dot_s, rel=1e-9)
    assert t.dash_ms == pytest.approx(1e3 * ratio * dot_s, rel=1e-9)
    assert t.dash_dot_ratio == pytest.approx(ratio, rel=1e-9)
    # ITU-R M.1677-1 gaps: 1 unit inside a character, 3 between characters, 7 between words
    assert t.element_gap_ms == pytest.approx(1e3 * dot_s, rel=1e-9)
    assert t.char_gap_ms == pytest.approx(3e3 * dot_s, rel=1e-9)
    assert t.word_gap_ms == pytest.approx(7e3 * dot_s, rel=1e-9)
    assert t.jitter_ms == pytest.approx(0.0, abs=1e-9)
    assert t.dot_spread_ms == pytest.approx(0.0, abs=1e-9)


def bloom_gaps_s(char_wpm: float, wpm: float) -> tuple[float, float]:
    """Character and word gap of Farnsworth timing, s (J. Bloom, QEX, April 1990).

    The extra delay per PARIS word is t_a = (60 c - 37.2 s) / (s c); it is spread over the
    19 units of spacing, 3/19 of it to each character gap and 7/19 to the word gap.
    """
    t_a = (60.0 * char_wpm - 37.2 * wpm) / (wpm * char_wpm)
    return 3.0 * t_a / 19.0, 7.0 * t_a / 19.0


@pytest.mark.parametrize(("char_wpm", "wpm"), [(18.0, 5.0), (20.0, 10.0), (20.0, 15.0),
                                               (25.0, 13.0), (30.0, 20.0)])
def test_farnsworth_overall_speed_follows_bloom(char_wpm, wpm):
    t_c, t_w = bloom_gaps_s(char_wpm, wpm)
    dot_s = 1.2 / char_wpm
    marks, dash, gaps = exact_marks("PARIS " * 6, dot_s=dot_s, char_gap_s=t_c, word_gap_s=t_w)
    # Bloom's timing keeps PARIS at 60 / wpm seconds, its word gap included
    span_s = marks.end_s[-1] - marks.start_s[0] + t_w
    assert span_s == pytest.approx(6 * 60.0 / wpm, rel=1e-12)
    syms = classify(marks)
    assert syms.dot_s == pytest.approx(dot_s, rel=1e-9)  # characters at char_wpm
    assert syms.farnsworth is True
    assert syms.farnsworth_wpm == pytest.approx(wpm, rel=1e-9)
    np.testing.assert_array_equal(syms.is_dash, dash)
    np.testing.assert_array_equal(syms.gap_class, gaps)
    assert decode(syms).text == "PARIS PARIS PARIS PARIS PARIS PARIS"


@pytest.mark.parametrize(("char_wpm", "wpm"), [(18.0, 5.0), (20.0, 20.0), (25.0, 13.0)])
def test_farnsworth_wpm_function_inverts_bloom(char_wpm, wpm):
    t_c, _ = bloom_gaps_s(char_wpm, wpm)  # J. Bloom, QEX 1990
    assert farnsworth_wpm(char_wpm, t_c) == pytest.approx(wpm, rel=1e-12)


@pytest.mark.parametrize("seed", range(4))
def test_jittered_keying_keeps_its_classes(seed):
    # 8 % timing spread: a dot must stretch to sqrt(3) units to pass for a dash, 7 standard
    # deviations away on a Gaussian model (and the generator limits draws to 3)
    k = key(MESSAGE, wpm=22.0, jitter=0.08, seed=seed)
    syms = classify(marks_of(k.start_s, k.end_s))
    np.testing.assert_array_equal(syms.is_dash, k.units == 3)
    assert decode(syms).text == k.text
    # 2 units from a dot's start to the next mark's start, of many such pairs, each with the
    # spread of two lengths: the median stays within a few per cent of the nominal unit
    assert syms.dot_s == pytest.approx(k.dot_s, rel=0.05)


def test_slow_speed_change_is_followed():
    k = key(MESSAGE + " " + MESSAGE, wpm=14.0, wpm_end=28.0)
    syms = classify(marks_of(k.start_s, k.end_s))
    np.testing.assert_array_equal(syms.is_dash, k.units == 3)
    assert decode(syms).text == k.text
    # exact timing: each mark's own unit is its length over its units
    true_dot = (k.end_s - k.start_s) / k.units
    n = k.n_marks
    for i in range(n):
        # a running median of 11 unit samples on a monotone glide stays inside the range
        # of the units around it (at most 12 marks either side hold those samples)
        near = true_dot[max(0, i - 12) : min(n, i + 13)]
        assert near.min() * (1 - 1e-9) <= syms.local_dot_s[i] <= near.max() * (1 + 1e-9)
    assert syms.local_dot_s[0] == pytest.approx(1.2 / 14.0, rel=0.1)
    assert syms.local_dot_s[-1] == pytest.approx(1.2 / 28.0, rel=0.1)


def test_no_marks_gives_no_unit():
    syms = classify(marks_of([], []))
    assert syms.dot_s is None and syms.wpm is None and syms.n_marks == 0
    t = report.timing(syms)
    assert all(v is None for v in t.__dict__.values())  # not measured: None, never 0


@pytest.mark.parametrize(("first_wpm", "then_wpm"), [(12.0, 25.0), (30.0, 14.0), (40.0, 20.0)])
def test_an_abrupt_speed_change_keeps_both_speeds(first_wpm, then_wpm):
    # two runs of exact ITU-R M.1677-1 timing, about twice (or half) the speed apart,
    # after a word gap at the slower speed; each mark's unit must be the one it was keyed
    # at, so every class is right
    a = key(MESSAGE, wpm=first_wpm)
    b = key(MESSAGE, wpm=then_wpm)
    gap_s = 7 * dot_s_from_wpm(min(first_wpm, then_wpm))
    shift = a.end_s[-1] + gap_s - b.start_s[0]
    syms = classify(marks_of(np.concatenate([a.start_s, b.start_s + shift]),
                             np.concatenate([a.end_s, b.end_s + shift])))
    units = np.concatenate([a.units, b.units])
    np.testing.assert_array_equal(syms.is_dash, units == 3)
    assert decode(syms).text == f"{a.text} {b.text}"
    true_dot = np.concatenate([np.full(a.n_marks, dot_s_from_wpm(first_wpm)),
                               np.full(b.n_marks, dot_s_from_wpm(then_wpm))])
    np.testing.assert_allclose(syms.local_dot_s, true_dot, rtol=1e-9)


def _after_a_long_mark(mark_units: float, gap_units: float):
    """The exact keying of MESSAGE at 20 WPM after one mark and gap of these lengths."""
    k = key(MESSAGE, wpm=20.0)
    u = dot_s_from_wpm(20.0)
    shift = (mark_units + gap_units) * u
    syms = classify(marks_of(np.concatenate([[0.0], k.start_s + shift]),
                             np.concatenate([[mark_units * u], k.end_s + shift])))
    return k, u, syms


def test_a_key_held_down_is_set_aside():
    # a tuning carrier of 50 units, a pause, then the message: the long mark is no element
    # (ITU-R M.1677-1 has none longer than 3 units), so the classes and the text are the
    # message's alone and the held mark is reported apart
    k, u, syms = _after_a_long_mark(50.0, 10.0)
    np.testing.assert_array_equal(syms.is_dash, k.units == 3)
    assert decode(syms).text == k.text
    np.testing.assert_allclose([syms.held_start_s[0], syms.held_end_s[0]], [0.0, 50 * u])
    assert syms.dot_s == pytest.approx(u, rel=1e-6)


def test_a_mark_longer_than_a_word_gap_does_not_split_the_classes():
    # a 12-unit mark among the message's: a dash, and every other class as keyed
    k, _, syms = _after_a_long_mark(12.0, 7.0)
    assert syms.is_dash[0] and syms.held_start_s.size == 0
    np.testing.assert_array_equal(syms.is_dash[1:], k.units == 3)
