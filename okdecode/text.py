"""Stage 4: symbols to characters, with the ITU-R M.1677-1 table.

The table holds every character and procedural signal of ITU-R Recommendation M.1677-1
(2009), "International Morse code", part I. Procedural signals are written in angle
brackets (``<AR>``). Where the Recommendation gives one pattern two meanings (the cross
``+`` is also the end-of-message signal ``<AR>``; the double hyphen ``=`` is also the
separation signal ``<BT>``; the multiplication sign ``×`` is the letter ``X``), decoding
gives one canonical spelling and :func:`canonical` maps every spelling onto it, so that
comparisons of sent and received text are fair.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from .errors import ParameterError

if TYPE_CHECKING:
    from .symbols import Symbols

#: Shown in decoded text for a mark/space pattern that the table does not hold.
PLACEHOLDER = "*"

# ITU-R M.1677-1 (2009), part I, section 1: letters, figures, punctuation and signals.
_LETTERS = {
    "A": ".-", "B": "-...", "C": "-.-.", "D": "-..", "E": ".", "É": "..-..", "F": "..-.",
    "G": "--.", "H": "....", "I": "..", "J": ".---", "K": "-.-", "L": ".-..", "M": "--",
    "N": "-.", "O": "---", "P": ".--.", "Q": "--.-", "R": ".-.", "S": "...", "T": "-",
    "U": "..-", "V": "...-", "W": ".--", "X": "-..-", "Y": "-.--", "Z": "--..",
}  # fmt: skip
_FIGURES = {
    "1": ".----", "2": "..---", "3": "...--", "4": "....-", "5": ".....",
    "6": "-....", "7": "--...", "8": "---..", "9": "----.", "0": "-----",
}  # fmt: skip
_PUNCTUATION = {
    ".": ".-.-.-",  # full stop
    ",": "--..--",  # comma
    ":": "---...",  # colon or division sign
    "?": "..--..",  # question mark
    "'": ".----.",  # apostrophe
    "-": "-....-",  # hyphen or dash or subtraction sign
    "/": "-..-.",  # fraction bar or division sign
    "(": "-.--.",  # left-hand bracket
    ")": "-.--.-",  # right-hand bracket
    '"': ".-..-.",  # inverted commas
    "=": "-...-",  # double hyphen
    "+": ".-.-.",  # cross or addition sign
    "×": "-..-",  # multiplication sign (same signal as X)
    "@": ".--.-.",  # commercial at
}
_SIGNALS = {
    "<SN>": "...-.",  # understood
    "<HH>": "........",  # error (eight dots)
    "<AR>": ".-.-.",  # end of message (cross)
    "<AS>": ".-...",  # wait
    "<SK>": "...-.-",  # end of work
    "<KA>": "-.-.-",  # starting signal (beginning of every transmission)
    "<BT>": "-...-",  # separation between parts of a message (double hyphen)
}

#: Every spelling the Recommendation gives, to its mark pattern ("." dot, "-" dash).
TABLE: dict[str, str] = {**_LETTERS, **_FIGURES, **_PUNCTUATION, **_SIGNALS}

# Decoding prefers the procedural signal where one pattern has two meanings, as on the
# air (common practice), and the letter X over the multiplication sign.
_PREFERRED = ("<AR>", "<BT>", "X")
#: Mark pattern to its canonical spelling.
PATTERNS: dict[str, str] = {}
for _spelling, _pattern in TABLE.items():
    if _pattern not in PATTERNS or _spelling in _PREFERRED:
        PATTERNS[_pattern] = _spelling

_TOKEN = re.compile(r"<[A-Z]{2,3}>|\s+|.", re.DOTALL)


@dataclass(frozen=True)
class Run:
    """One stretch of constant key state, in dot units."""

    key_down: bool
    units: int  # 1 or 3 for a mark; 1, 3 or 7 for a space


def tokens(message: str) -> list[str]:
    """Split text into characters, procedural signals and single word breaks.

    Parameters
    ----------
    message : str
        Text; case does not matter. ``<AR>`` style groups are one token; any run of
        white space is one word break, given as ``" "``; leading and trailing space
        is dropped.

    Returns
    -------
    list of str
        Uppercase tokens.

    Examples
    --------
    >>> tokens("cq  de <AR>")
    ['C', 'Q', ' ', 'D', 'E', ' ', '<AR>']
    """
    out: list[str] = []
    for tok in _TOKEN.findall(message.strip().upper()):
        if tok.isspace():
            if out and out[-1] != " ":
                out.append(" ")
        else:
            out.append(tok)
    return out


def encode(message: str, *, source: str = "<text>") -> list[str]:
    """Mark patterns of a message, one per token (``" "`` for a word break).

    Raises
    ------
    ParameterError
        If a character has no signal in ITU-R M.1677-1.

    Examples
    --------
    >>> encode("SOS")
    ['...', '---', '...']
    """
    out = []
    for tok in tokens(message):
        if tok == " ":
            out.append(" ")
        elif tok in TABLE:
            out.append(TABLE[tok])
        else:
            raise ParameterError(
                source, f"{tok!r} has no signal in ITU-R M.1677-1", expected="letters, "
                "figures, . , : ? ' - / ( ) \" = + × @ or <AR> <AS> <BT> <HH> <KA> <SK> <SN>"
            )
    return out


def runs(message: str, *, source: str = "<text>") -> list[Run]:
    """Key-down and key-up runs of a message in dot units, without a trailing space.

    A dot is 1 unit and a dash 3; the gaps are 1 unit inside a character, 3 between
    characters and 7 between words (ITU-R M.1677-1, part I, section 2).

    Examples
    --------
    >>> [(r.key_down, r.units) for r in runs("EE T")]
    [(True, 1), (False, 3), (True, 1), (False, 7), (True, 3)]
    """
    out: list[Run] = []
    pending_gap = 0
    for pattern in encode(message, source=source):
        if pattern == " ":
            pending_gap = 7
            continue
        for i, element in enumerate(pattern):
            gap = 1 if i else pending_gap
            if gap and out:
                out.append(Run(False, gap))
            out.append(Run(True, 1 if element == "." else 3))
        pending_gap = 3
    return out


def units(message: str) -> int:
    """Length of a message in dot units, a word gap after it included.

    Examples
    --------
    >>> units("PARIS")  # the standard word: 50 units (common practice)
    50
    """
    body = sum(r.units for r in runs(message))
    return body + 7 if body else 0


def decode_pattern(pattern: str) -> str | None:
    """Canonical spelling of a mark pattern, or ``None`` if the table has none.

    Examples
    --------
    >>> decode_pattern(".-.-."), decode_pattern("........."), decode_pattern("-..-")
    ('<AR>', None, 'X')
    """
    return PATTERNS.get(pattern)


def canonical(message: str) -> str:
    """Text with every spelling replaced by the one decoding gives.

    Characters that the table lacks are kept as they are; white space becomes single
    spaces. Use it on both sides of a comparison of sent and received text.

    Examples
    --------
    >>> canonical("a+b = c×2")
    'A<AR>B <BT> CX2'
    """
    out = []
    for tok in tokens(message):
        out.append(PATTERNS.get(TABLE[tok], tok) if tok in TABLE else tok)
    return "".join(out)


@dataclass(frozen=True)
class Character:
    """One decoded character (or procedural signal) and where it was heard."""

    char: str  # canonical spelling, PLACEHOLDER when the pattern is not in the table
    pattern: str  # the marks heard, "." and "-"
    start_s: float  # start of its first mark, s
    end_s: float  # end of its last mark, s
    confidence: float  # probability, 0..1, that every element and gap was right
    word_start: bool  # a word gap (or the start) comes before it


@dataclass(frozen=True)
class Decoded:
    """The text of a recording with its characters."""

    text: str  # words separated by single spaces
    characters: tuple[Character, ...]
    n_unknown: int  # characters shown as PLACEHOLDER


def decode(symbols: Symbols) -> Decoded:
    """Group classified marks into characters and read them from the table.

    Parameters
    ----------
    symbols : Symbols
        Marks with their dot/dash classes and gap classes.

    Returns
    -------
    Decoded
        Character and word gaps end a character; a word gap becomes one space. A
        character's confidence is the product of its elements', its inner gaps' and the
        gap that ends it.
    """
    n = symbols.n_marks
    if n == 0:
        return Decoded("", (), 0)
    breaks = np.flatnonzero(symbols.gap_class != 1)
    starts = np.concatenate([[0], breaks + 1])
    ends = np.concatenate([breaks, [n - 1]])
    chars: list[Character] = []
    pieces: list[str] = []
    n_unknown = 0
    for k, (i, j) in enumerate(zip(starts, ends, strict=True)):
        pattern = "".join("-" if d else "." for d in symbols.is_dash[i : j + 1])
        spelling = decode_pattern(pattern)
        if spelling is None:
            spelling = PLACEHOLDER
            n_unknown += 1
        conf = float(np.prod(symbols.mark_confidence[i : j + 1]))
        conf *= float(np.prod(symbols.gap_confidence[i:j]))
        if j < n - 1:
            conf *= float(symbols.gap_confidence[j])
        word_start = k == 0 or symbols.gap_class[i - 1] == 7
        if word_start and k:
            pieces.append(" ")
        pieces.append(spelling)
        chars.append(Character(char=spelling, pattern=pattern,
                               start_s=float(symbols.start_s[i]), end_s=float(symbols.end_s[j]),
                               confidence=conf if spelling != PLACEHOLDER else min(conf, 0.5),
                               word_start=bool(word_start)))
    return Decoded("".join(pieces), tuple(chars), n_unknown)
