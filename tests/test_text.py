"""Tests of stage 4 (okdecode.text) against ITU-R M.1677-1 and the PARIS standard word."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from okdecode.errors import ParameterError
from okdecode.marks import Levels, Marks
from okdecode.symbols import classify, dot_s_from_wpm
from okdecode.text import (
    PATTERNS,
    PLACEHOLDER,
    TABLE,
    canonical,
    decode,
    decode_pattern,
    encode,
    runs,
    tokens,
    units,
)

# ITU-R M.1677-1 (2009), "International Morse code", part I, section 1, written out here
# (from memory of the Recommendation) rather than taken from okdecode: letters (1.1.1),
# figures (1.1.2), punctuation marks and miscellaneous signs (1.1.3). "." dot, "-" dash.
ITU_LETTERS = {
    "A": ".-", "B": "-...", "C": "-.-.", "D": "-..", "E": ".", "É": "..-..",  # accented e
    "F": "..-.", "G": "--.", "H": "....", "I": "..", "J": ".---", "K": "-.-", "L": ".-..",
    "M": "--", "N": "-.", "O": "---", "P": ".--.", "Q": "--.-", "R": ".-.", "S": "...",
    "T": "-", "U": "..-", "V": "...-", "W": ".--", "X": "-..-", "Y": "-.--", "Z": "--..",
}  # fmt: skip
ITU_FIGURES = {
    "1": ".----", "2": "..---", "3": "...--", "4": "....-", "5": ".....",
    "6": "-....", "7": "--...", "8": "---..", "9": "----.", "0": "-----",
}  # fmt: skip
ITU_PUNCTUATION = {
    ".": ".-.-.-",  # full stop
    ",": "--..--",  # comma
    ":": "---...",  # colon or division sign
    "?": "..--..",  # question mark, or request for repetition
    "'": ".----.",  # apostrophe
    "-": "-....-",  # hyphen or dash or subtraction sign
    "/": "-..-.",  # fraction bar or division sign
    "(": "-.--.",  # left-hand bracket (parenthesis)
    ")": "-.--.-",  # right-hand bracket (parenthesis)
    '"': ".-..-.",  # inverted commas (quotation marks)
    "=": "-...-",  # double hyphen
    "+": ".-.-.",  # cross or addition sign
    "×": "-..-",  # multiplication sign, the same signal as the letter X
    "@": ".--.-.",  # commercial at
}
# The procedural signals of 1.1.3, in angle brackets by okdecode's convention (issue 2).
ITU_SIGNALS = {
    "<SN>": "...-.",  # understood
    "<HH>": "........",  # error (eight dots)
    "<AR>": ".-.-.",  # cross; end of a telegram or of a transmission
    "<AS>": ".-...",  # wait
    "<SK>": "...-.-",  # end of work
    "<KA>": "-.-.-",  # starting signal (to precede every transmission)
    "<BT>": "-...-",  # double hyphen; separation signal
}
ITU = {**ITU_LETTERS, **ITU_FIGURES, **ITU_PUNCTUATION, **ITU_SIGNALS}
# ITU-R M.1677-1 gives three patterns two meanings; decoding writes one of them (issue 2)
CANONICAL = {"+": "<AR>", "=": "<BT>", "×": "X"}


def canonical_of(spelling: str) -> str:
    return CANONICAL.get(spelling, spelling)


# --- the table ---------------------------------------------------------------------------


def test_table_is_exactly_the_recommendation():
    # ITU-R M.1677-1 (2009), part I, 1.1.1 to 1.1.3: nothing missing, nothing invented
    assert TABLE == ITU


@pytest.mark.parametrize("spelling", sorted(ITU))
def test_every_character_encodes_and_decodes(spelling):
    pattern = ITU[spelling]  # ITU-R M.1677-1 (2009), part I, section 1
    assert encode(spelling) == [pattern]
    assert decode_pattern(pattern) == canonical_of(spelling)
    assert canonical(spelling) == canonical_of(spelling)


def test_shared_patterns_decode_to_one_canonical_spelling():
    # ITU-R M.1677-1 (2009): the cross is also the end signal, the double hyphen the
    # separation signal, and the multiplication sign is keyed as the letter X
    assert decode_pattern(".-.-.") == "<AR>"
    assert decode_pattern("-...-") == "<BT>"
    assert decode_pattern("-..-") == "X"
    assert canonical("+ = ×") == "<AR> <BT> X"
    # every other pattern of the Recommendation is unambiguous
    patterns = list(ITU.values())
    shared = {p for p in patterns if patterns.count(p) > 1}
    assert shared == {".-.-.", "-...-", "-..-"}
    assert set(PATTERNS) == set(patterns)


@pytest.mark.parametrize("pattern", ["", "........-", ".........", "-.-.-.-", "---.-"])
def test_patterns_outside_the_table_have_no_spelling(pattern):
    # none of these is in ITU-R M.1677-1 (2009), part I, section 1
    assert pattern not in ITU.values()
    assert decode_pattern(pattern) is None


def test_character_without_a_signal_raises_parameter_error():
    # "%" and "#" have no signal of their own in ITU-R M.1677-1 (2009)
    with pytest.raises(ParameterError, match=r"^msg\.txt: "):
        encode("50 % #", source="msg.txt")
    with pytest.raises(ParameterError, match=r"^<text>: "):
        runs("A#B")


# --- timing ------------------------------------------------------------------------------

WORD = st.lists(st.sampled_from(sorted(ITU)), min_size=1, max_size=6)
MESSAGE = st.lists(WORD, min_size=1, max_size=5)


def expected_runs(words: list[list[str]]) -> list[tuple[bool, int]]:
    """Key-down/up runs from the ITU table: dot 1, dash 3; gaps 1 / 3 / 7 units."""
    out: list[tuple[bool, int]] = []
    for w, word in enumerate(words):
        for c, spelling in enumerate(word):
            for e, element in enumerate(ITU[spelling]):
                if e:
                    out.append((False, 1))  # ITU-R M.1677-1, 2.3: within a character
                elif c:
                    out.append((False, 3))  # 2.4: between the letters of a word
                elif w:
                    out.append((False, 7))  # 2.5: between two words
                out.append((True, 1 if element == "." else 3))  # 2.1, 2.2: dash = 3 dots
    return out


@given(MESSAGE)
def test_runs_follow_the_1_3_and_1_3_7_timing(words):
    message = " ".join("".join(word) for word in words)
    got = [(r.key_down, r.units) for r in runs(message)]
    # ITU-R M.1677-1 (2009), part I, section 2: dash 3 units; gaps 1, 3 and 7
    assert got == expected_runs(words)
    assert units(message) == sum(n for _, n in got) + 7  # the closing word gap counted


def test_runs_of_a_small_message_by_hand():
    # ITU-R M.1677-1 (2009): E is ".", T is "-"; gaps 3 between letters, 7 between words
    assert [(r.key_down, r.units) for r in runs("EE T")] == [
        (True, 1), (False, 3), (True, 1), (False, 7), (True, 3)]  # fmt: skip


def test_paris_is_50_units():
    # PARIS with its word gap is 50 units (common practice, the standard word for WPM):
    # P .--. 11, A .- 5, R .-. 7, I .. 3, S ... 5 = 31 units of marks and element gaps,
    # 4 letter gaps of 3 = 12, one word gap of 7
    assert 11 + 5 + 7 + 3 + 5 + 4 * 3 + 7 == 50
    assert units("PARIS") == 50
    assert units("PARIS PARIS PARIS") == 150
    assert units("paris") == 50  # case does not matter


@pytest.mark.parametrize("wpm", [5.0, 12.0, 20.0, 25.0, 50.0])
def test_dot_is_1_2_over_wpm(wpm):
    # PARIS = 50 units (common practice): WPM words a minute are 50 WPM units in 60 s
    assert dot_s_from_wpm(wpm) == pytest.approx(60.0 / (50.0 * wpm), rel=1e-12)
    assert dot_s_from_wpm(wpm) == pytest.approx(1.2 / wpm, rel=1e-12)


# --- tokens and canonical spelling -------------------------------------------------------


def test_tokens_split_signals_and_collapse_spaces():
    assert tokens("cq  de <ar>") == ["C", "Q", " ", "D", "E", " ", "<AR>"]
    assert tokens("  xq7zb\t\n73  ") == ["X", "Q", "7", "Z", "B", " ", "7", "3"]
    assert tokens("") == []
    assert tokens("<KA><SK>") == ["<KA>", "<SK>"]


@given(MESSAGE)
def test_canonical_is_idempotent_and_keeps_the_signal(words):
    message = " ".join("".join(word) for word in words)
    once = canonical(message)
    assert canonical(once) == once
    # the canonical text keys exactly as the original (ITU-R M.1677-1 patterns)
    assert encode(once) == encode(message)
    assert once == " ".join("".join(canonical_of(s) for s in word) for word in words)


# --- decoding classified symbols ---------------------------------------------------------


def symbols_of_patterns(patterns: list[str], *, dot_s: float = 0.06):
    """Classified marks of characters given as patterns; "" stands for a word break."""
    t, start, end, gaps, pending = 0.0, [], [], [], 0
    for p in patterns:
        if p == "":
            pending = 7
            continue
        for k, element in enumerate(p):
            if start:
                gaps.append(1 if k else pending)
                t += gaps[-1] * dot_s
            length = 1 if element == "." else 3
            start.append(t)
            end.append(t + length * dot_s)
            t = end[-1]
        pending = 3
    empty = np.empty(0)
    marks = Marks(start_s=np.array(start), end_s=np.array(end), level=np.ones(len(start)),
                  peak_snr_db=np.full(len(start), 30.0),
                  levels=Levels(empty, empty, empty, empty, empty), source="<test>")
    return classify(marks)


def test_unknown_pattern_becomes_a_counted_placeholder():
    # "........." (nine dots) and "---.-" are not in ITU-R M.1677-1 (2009)
    syms = symbols_of_patterns([".-", ".........", "", "-", "---.-", "", "-.-"])
    decoded = decode(syms)
    assert decoded.text == f"A{PLACEHOLDER} T{PLACEHOLDER} K"
    assert decoded.n_unknown == 2
    chars = [c.char for c in decoded.characters]
    assert chars == ["A", PLACEHOLDER, "T", PLACEHOLDER, "K"]
    assert [c.pattern for c in decoded.characters][1] == "........."
    assert all(0.0 <= c.confidence <= 1.0 for c in decoded.characters)


@given(MESSAGE)
def test_decode_of_exact_timing_gives_the_canonical_text(words):
    # PARIS first: with dots, dashes and both kinds of gap in the recording the unit is
    # unambiguous (a message of dashes alone would read as well as dots at a third the speed)
    words = [list("PARIS"), *words]
    patterns: list[str] = []
    for w, word in enumerate(words):
        if w:
            patterns.append("")
        patterns += [ITU[s] for s in word]
    decoded = decode(symbols_of_patterns(patterns))
    # ITU-R M.1677-1 patterns; a word gap of 7 units becomes one space (issue 2)
    expected = " ".join("".join(canonical_of(s) for s in word) for word in words)
    assert decoded.text == expected
    assert decoded.n_unknown == 0
    assert [c.word_start for c in decoded.characters] == [
        i == 0 for word in words for i in range(len(word))]
