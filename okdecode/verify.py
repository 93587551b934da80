"""Verify a reception against the message that was sent.

The received text is aligned with the expected one by edit distance (Levenshtein's
operations: substitution, missing character, extra character, each of cost 1), on
tokens: characters, procedural signals such as ``<AR>`` (one token each) and word
spaces, with both sides in the spelling of :func:`okdecode.text.canonical`, so that
``+`` and ``<AR>`` are the same signal.

The alignment is *semi-global*: the expected message may start and end anywhere in the
received text, and what was decoded before or after it (noise read as letters before the
transmission, other copies of a beacon's text) is not an error. The character error rate
is the distance of the best copy over the number of expected tokens; the number of
*intact copies* counts the non-overlapping exact occurrences of the message.

Alongside the decode, :mod:`okdecode.detect` searches the recording for the keying of the
expected text, which says whether the message is there even when it is too weak to read.

References
----------
.. [1] V. I. Levenshtein, "Binary codes capable of correcting deletions, insertions and
   reversals", Soviet Physics Doklady 10(8), 1966.
.. [2] R. A. Wagner and M. J. Fischer, "The string-to-string correction problem",
   J. ACM 21(1), 1974 (the dynamic program and its trace-back).
.. [3] P. H. Sellers, "The theory and computation of evolutionary distances: pattern
   recognition", J. Algorithms 1(4), 1980 (the best match of a pattern within a text).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from os import PathLike

from . import text as tx
from .detect import Detection, search, search_capture
from .errors import ParameterError

#: Decode options of decode_capture; the other keyword options go to the reader.
_DECODE_KEYS = ("carrier_hz", "channel", "wpm", "decoder", "progress")


@dataclass(frozen=True)
class Difference:
    """One edit that turns the expected message into what was received."""

    kind: str  # "substitution", "missing" or "extra"
    expected: str | None  # the expected token (None for an extra one); " " a word space
    received: str | None  # the received token (None for a missing one)
    time_s: float | None  # where in the recording, s (None when nothing was decoded)

    def to_dict(self) -> dict:
        return {"kind": self.kind, "expected": self.expected, "received": self.received,
                "time_s": None if self.time_s is None else round(self.time_s, 4)}


@dataclass(frozen=True)
class Alignment:
    """The best match of the expected tokens within the received ones."""

    distance: int  # edits in all
    start: int  # index of the first received token of the match
    end: int  # one past its last
    operations: tuple[tuple[str, int | None, int | None], ...]  # (kind, i_expected, j_recv)


def edit_distance(a: Sequence[str], b: Sequence[str]) -> int:
    """Levenshtein distance between two token sequences (unit costs).

    Examples
    --------
    >>> edit_distance("KITTEN", "SITTING")
    3
    """
    prev = list(range(len(b) + 1))
    for i in range(1, len(a) + 1):
        cur = [i] + [0] * len(b)
        ai = a[i - 1]
        for j in range(1, len(b) + 1):
            cur[j] = min(prev[j] + 1, cur[j - 1] + 1, prev[j - 1] + (ai != b[j - 1]))
        prev = cur
    return prev[-1]


def align(expected: Sequence[str], received: Sequence[str], *, free_ends: bool = True
          ) -> Alignment:
    """Align expected tokens with received ones by edit distance, with the trace-back.

    Parameters
    ----------
    expected, received : sequence of str
        Tokens.
    free_ends : bool
        True: the expected tokens are matched against the best stretch of the received
        ones [3]_ (leading and trailing received tokens cost nothing); False: whole
        against whole [2]_.

    Returns
    -------
    Alignment
        Distance, the matched stretch ``received[start:end]`` and the operations in order,
        each ``(kind, i, j)``: "match", "substitution", "missing" (j is the received index
        before which it is missing) or "extra" (i is None).

    Examples
    --------
    >>> a = align(list("SOS"), list("EESOTSE"))
    >>> a.distance, a.start, a.end
    (1, 2, 6)
    """
    n, m = len(expected), len(received)
    # d[i][j]: cost of expected[:i] against received[k:j] for the best k (free_ends) or
    # k = 0; k[i][j] that start (on ties the earliest, so that the copy is the longest);
    # move[i][j] the step that got there: 0 diagonal, 1 missing, 2 extra
    d = [[0] * (m + 1) for _ in range(n + 1)]
    k = [[0] * (m + 1) for _ in range(n + 1)]
    move = [[2] * (m + 1) for _ in range(n + 1)]
    for j in range(m + 1):
        d[0][j] = 0 if free_ends else j
        k[0][j] = j if free_ends else 0
    for i in range(1, n + 1):
        row, up, krow, kup, mrow = d[i], d[i - 1], k[i], k[i - 1], move[i]
        row[0], krow[0], mrow[0] = i, kup[0], 1
        e = expected[i - 1]
        for j in range(1, m + 1):
            best = (up[j - 1] + (e != received[j - 1]), kup[j - 1], 0)
            cand = (up[j] + 1, kup[j], 1)
            if cand[:2] < best[:2]:
                best = cand
            cand = (row[j - 1] + 1, krow[j - 1], 2)
            if cand[:2] < best[:2]:
                best = cand
            row[j], krow[j], mrow[j] = best
    if free_ends:
        last, klast = d[n], k[n]
        # the least cost; on ties the longest copy: latest end, then earliest start
        end = min(range(m + 1), key=lambda j: (last[j], -(j - klast[j]), -j))
    else:
        end = m
    i, j = n, end
    ops: list[tuple[str, int | None, int | None]] = []
    while i > 0 or (j > 0 and not free_ends):
        step = move[i][j] if i > 0 else 2
        if step == 0:
            kind = "match" if expected[i - 1] == received[j - 1] else "substitution"
            ops.append((kind, i - 1, j - 1))
            i, j = i - 1, j - 1
        elif step == 1:
            ops.append(("missing", i - 1, j))
            i -= 1
        else:
            ops.append(("extra", None, j - 1))
            j -= 1
    ops.reverse()
    return Alignment(distance=d[n][end], start=j, end=end, operations=tuple(ops))


def count_copies(expected: Sequence[str], received: Sequence[str]) -> int:
    """Non-overlapping exact occurrences of the expected tokens in the received ones.

    Examples
    --------
    >>> count_copies(["V", "V"], list("VVVVV"))
    2
    """
    n = len(expected)
    if n == 0:
        return 0
    count, j = 0, 0
    exp = list(expected)
    while j + n <= len(received):
        if list(received[j : j + n]) == exp:
            count += 1
            j += n
        else:
            j += 1
    return count


def expected_tokens(expected: str, *, source: str = "<expected>") -> list[str]:
    """Tokens of an expected message in canonical spelling (ParameterError if unsendable).

    Examples
    --------
    >>> expected_tokens("cq de xq7zb +")
    ['C', 'Q', ' ', 'D', 'E', ' ', 'X', 'Q', '7', 'Z', 'B', ' ', '<AR>']
    """
    tx.encode(expected, source=source)  # raises for a character without a signal
    toks = tx.tokens(tx.canonical(expected))
    if not toks:
        raise ParameterError(source, "the expected text is empty", expected="a message")
    return toks


def received_tokens(reception) -> tuple[list[str], list[float | None]]:
    """Tokens of a reception's text with the time of each (a space: its gap's middle)."""
    toks: list[str] = []
    times: list[float | None] = []
    chars = reception.characters
    if not chars:
        for tok in tx.tokens(reception.text):
            toks.append(tok)
            times.append(None)
        return toks, times
    for k, c in enumerate(chars):
        if c.word_start and k:
            toks.append(" ")
            times.append(0.5 * (chars[k - 1].end_s + c.start_s))
        toks.append(c.char)
        times.append(c.start_s)
    return toks, times


@dataclass(frozen=True)
class Verification:
    """Did the expected message arrive, how intact, and is its keying there at all."""

    file: str
    expected: str  # canonical spelling
    text: str  # what was decoded
    cer: float  # edits of the best copy / expected tokens
    distance: int
    received: bool  # cer <= max_cer
    max_cer: float
    copies: int  # intact copies
    differences: tuple[Difference, ...]
    best_start_s: float | None  # the best copy's first and last decoded character
    best_end_s: float | None
    best_text: str  # the best copy as decoded
    detection: Detection | None
    alternatives: tuple[str, ...] = ()  # the candidates, when the expected text was chosen
    reception: object | None = field(default=None, repr=False, compare=False)

    def to_dict(self) -> dict:
        """The JSON object of ``okdecode verify --json``."""
        rec = self.reception
        out = {
            "file": self.file,
            "expected": self.expected,
            "text": self.text,
            "cer": round(self.cer, 4),
            "received": self.received,
            "copies": self.copies,
            "differences": [d.to_dict() for d in self.differences],
            "detection": None if self.detection is None else self.detection.to_dict(),
            "max_cer": self.max_cer,
            "distance": self.distance,
            "best_copy": {"text": self.best_text,
                          "start_s": _round(self.best_start_s),
                          "end_s": _round(self.best_end_s)},
        }
        if self.alternatives:
            out["alternatives"] = list(self.alternatives)
        if rec is not None:
            d = rec.to_dict()
            for key in ("carrier_hz", "wpm", "cn0_dbhz", "snr_db", "warnings"):
                out[key] = d[key]
        return out


def _round(v: float | None) -> float | None:
    return None if v is None else round(float(v), 4)


def _check_max_cer(max_cer: float, source: str) -> float:
    try:
        v = float(max_cer)
    except (TypeError, ValueError):
        v = float("nan")
    if not 0.0 <= v <= 1.0:
        raise ParameterError(source, f"maximum CER {max_cer!r}", expected="0 to 1")
    return v


def _candidates(expected: str | Sequence[str], expect_alternatives: bool, source: str
                ) -> list[str]:
    if isinstance(expected, str):
        texts = [expected]
    else:
        texts = [str(t) for t in expected if str(t).strip()]
        if not texts:
            raise ParameterError(source, "no expected message given", expected="a message")
        if not expect_alternatives:
            # in order: the messages follow one another in the recording
            texts = [" ".join(texts)]
    return ["".join(expected_tokens(t, source=source)) for t in texts]


def compare(reception, expected: str, *, max_cer: float = 0.0) -> Verification:
    """Align a reception's text with one expected message (no detection).

    Parameters
    ----------
    reception : Reception
        A decode (:func:`okdecode.receiver.decode_file`).
    expected : str
        The sent text.
    max_cer : float
        Largest character error rate that still counts as received.
    """
    source = reception.file
    max_cer = _check_max_cer(max_cer, source)
    exp = expected_tokens(expected, source=source)
    got, times = received_tokens(reception)
    al = align(exp, got)
    diffs = []
    for kind, i, j in al.operations:
        if kind == "match":
            continue
        if kind == "missing":
            # the time of the received token it should have come before (or the last one)
            t = times[j] if j is not None and j < len(times) else (times[-1] if times
                                                                     else None)
            diffs.append(Difference(kind, exp[i], None, t))
        elif kind == "extra":
            diffs.append(Difference(kind, None, got[j], times[j]))
        else:
            diffs.append(Difference(kind, exp[i], got[j], times[j]))
    matched = [j for _, _, j in al.operations if j is not None and j < len(got)]
    span = got[al.start : al.end]
    t_in = [times[j] for j in range(al.start, al.end) if times[j] is not None]
    cer = al.distance / len(exp)
    return Verification(file=source, expected="".join(exp), text=reception.text, cer=cer,
                        distance=al.distance, received=cer <= max_cer + 1e-12,
                        max_cer=max_cer, copies=count_copies(exp, got),
                        differences=tuple(diffs),
                        best_start_s=t_in[0] if t_in and matched else None,
                        best_end_s=t_in[-1] if t_in and matched else None,
                        best_text="".join(span), detection=None, reception=reception)


def verify_reception(reception, expected: str | Sequence[str], *, max_cer: float = 0.0,
                     expect_alternatives: bool = False, capture=None, detect: bool = True,
                     carrier_hz: float | None = None, channel: int | None = None,
                     detect_options: dict | None = None) -> Verification:
    """Verify a decode against the expected message(s), with known-message detection.

    Parameters
    ----------
    reception : Reception
        A decode of the recording.
    expected : str or sequence of str
        The sent text; a sequence holds several messages, sent one after another in the
        recording (compared as one text, joined by word spaces), or with
        ``expect_alternatives`` any one of which was sent (the best match counts).
    max_cer : float
        Largest character error rate that still counts as received (0: exact).
    expect_alternatives : bool
        See ``expected``.
    capture : Capture, optional
        The recording, needed for detection when the decoder kept no baseband (it found
        no keyed carrier): the likeliest carrier bins are then tuned to.
    detect : bool
        Run the known-message search (:func:`okdecode.detect.search`).
    carrier_hz, channel : optional
        As given to the decoder.
    detect_options : dict, optional
        Options of :func:`okdecode.detect.search` (``wpm_range``, ``max_stretch``, ...).

    Returns
    -------
    Verification
    """
    source = reception.file
    texts = _candidates(expected, expect_alternatives, source)
    results = [compare(reception, t, max_cer=max_cer) for t in texts]
    best_cer = min(r.cer for r in results)
    tied = [r for r in results if r.cer == best_cer]
    opts = dict(detect_options or {})
    chosen = tied[0]
    if detect:
        detections = [_detect(reception, r.expected, capture, carrier_hz, channel,
                              len(tied), opts) for r in tied]
        k = min(range(len(tied)), key=lambda i: (
            detections[i].false_alarm_probability
            if detections[i].false_alarm_probability is not None else 2.0))
        chosen = _replace(tied[k], detection=detections[k])
    if len(texts) > 1:
        chosen = _replace(chosen, alternatives=tuple(texts))
    return chosen


def _replace(v: Verification, **changes) -> Verification:
    from dataclasses import replace

    return replace(v, **changes)


def _detect(reception, expected: str, capture, carrier_hz, channel, n_messages: int,
            opts: dict) -> Detection:
    n_hyp = max(int(n_messages), 1)
    if reception.baseband is not None:
        opts = {**opts, "n_hypotheses": n_hyp * opts.get("n_hypotheses", 1)}
        return search(reception.baseband, expected, source=reception.file, **opts)
    if capture is None:
        from .detect import nothing

        return nothing(alpha=opts.get("alpha", 0.01), carrier_hz=carrier_hz)
    return search_capture(capture, expected, spectrum=reception.spectrum,
                          carrier_hz=carrier_hz, channel=channel, n_messages=n_hyp, **opts)


def verify_file(path: str | PathLike, expected: str | Sequence[str], *, max_cer: float = 0.0,
                expect_alternatives: bool = False, detect: bool = True,
                detect_options: dict | None = None, **decode_options) -> Verification:
    """Decode a recording and verify it against the message that was sent.

    Parameters
    ----------
    path : str or PathLike
        The recording.
    expected : str or sequence of str
        The sent text, or several (see :func:`verify_reception`).
    max_cer : float
        Largest character error rate that still counts as received (0: exact).
    expect_alternatives : bool
        A sequence of texts holds alternatives rather than messages in order.
    detect : bool
        Run the known-message search as well.
    detect_options : dict, optional
        Options of :func:`okdecode.detect.search`.
    **decode_options
        ``carrier_hz``, ``channel``, ``wpm``, ``decoder``, ``progress`` for the decoder;
        the others (``rate_hz``, ``iq_format``, ``center_hz``, ...) for the reader.

    Returns
    -------
    Verification
        ``to_dict()`` gives the JSON of ``okdecode verify --json``.

    Raises
    ------
    CaptureError
        If the file cannot be read as a recording.
    ParameterError
        If an option is absurd or the expected text holds a character without a signal.
    """
    from .capture import open_capture
    from .receiver import decode_capture

    source = str(path)
    _candidates(expected, expect_alternatives, source)  # bad text fails before decoding
    _check_max_cer(max_cer, source)
    decode = {k: v for k, v in decode_options.items() if k in _DECODE_KEYS}
    reader = {k: v for k, v in decode_options.items() if k not in _DECODE_KEYS}
    capture = open_capture(path, **reader)
    reception = decode_capture(capture, **decode)
    return verify_reception(reception, expected, max_cer=max_cer,
                            expect_alternatives=expect_alternatives, capture=capture,
                            detect=detect, carrier_hz=decode.get("carrier_hz"),
                            channel=decode.get("channel"), detect_options=detect_options)
