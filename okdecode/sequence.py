"""Soft-decision sequence decoder: the marks and their classes decided on the whole sequence.

The threshold path (:mod:`okdecode.marks`, :mod:`okdecode.symbols`) decides key-down
sample by sample and then classes each mark and space on its own. This module decides the
whole message at once, from the complex baseband, with the code's structure built in.

Model
-----
*Segments.* A message is a sequence of marks and gaps (a hidden semi-Markov model, with
explicit durations [1]_). Marks are dots or dashes; gaps are element, character or word
gaps, or pauses of any length. Which element may follow which is given by the tree of
the ITU-R M.1677-1 patterns [2]_: a mark moves one step down the tree, an element gap
keeps the position, and a character or word gap may only follow a mark that completes a
pattern of the table, whose character it then emits. So every decoded character is one
of the table's.

*Time.* The durations are counted in steps of ``1 / STEPS_PER_UNIT`` of the local dot,
on a time axis warped by the tracked speed: a speed change within the message leaves
the durations in steps where they were. Each class has a Gaussian law of duration in
units, its mean and spread measured from the threshold path's classes and then from
the first pass of this one, which covers weighting, odd dash/dot ratios, hand-sent
jitter and Farnsworth spacing.

*Speed.* The threshold path's tracked unit is the start. Below the level where it
finds the marks, it reads noise as code of an absurd speed; machine-timed code then
still shows its speed as a spectral line of its rising edges (:func:`line_unit_s`),
sharp to a fraction of a per cent over a message. Where both are credible and
disagree, the pass with the higher likelihood decides. Each pass re-measures the unit
on its decision, from the start-to-start times of a dot and the element gap after it
(2 units whatever the weighting).

*Evidence.* For a mark from ``t0`` to ``t1`` holding ``L`` baseband samples, the sum
``y`` of the baseband over it is the matched filter's output for a rectangular pulse of
unknown phase. With ``A`` the carrier's amplitude in the baseband, ``N0`` the two-sided
noise density and ``fs`` the baseband rate, ``y`` is Rician with ``|E y| = L A`` under a
mark and Rayleigh with ``E|y|^2 = L fs N0`` under noise, so the log-likelihood ratio of
a mark against noise is [3]_

    LLR = ln I0(2 A |y| / (fs N0)) - L A^2 / (fs N0).

A keyed oscillator does not always hold its phase over a long mark: it drifts, or
chirps at each key-down, and a coherent sum over a dash then falls while two dots with a
gap between keep theirs. So the same ratio is also taken with the phase held for one
dot at a time only, as the sum of the blocks' ratios, and each mark counts the likelier
of the two phase models (a generalised likelihood ratio; for a steady carrier the
coherent one, which is the larger, stands).

Gaps add nothing against the all-noise reference, so a whole hypothesis scores the
sum of its marks' ratios plus the log-probabilities of its durations and characters.
``A`` is tracked through fades by a kernel-weighted, noise-corrected mean of
``|y|^2`` over the decided marks; ``N0`` comes from the envelope's noise measurement.

*Decision.* Viterbi's algorithm [4]_ over the steps gives the most likely sequence;
since no segment is shorter than ``B`` steps, ``B`` steps at a time are computed
together, and long recordings are cut into overlapping chunks decoded side by side
(:func:`viterbi`). Where the decision differs from the one its laws were measured on,
a second pass re-measures speed, amplitude and durations on it and decodes again.

*Confidence.* Each mark's confidence is the probability that it is there (the
logistic of its ratio) times the probability of its class given its length under the
duration laws; each gap's is the probability of its class given its length.

References
----------
.. [1] S.-Z. Yu, "Hidden semi-Markov models", Artificial Intelligence 174(2), 2010.
.. [2] ITU-R Recommendation M.1677-1, "International Morse code", 2009.
.. [3] J. G. Proakis and M. Salehi, "Digital Communications", 5th ed., McGraw-Hill,
   2008, section 4.5 (noncoherent detection; Rice and Rayleigh envelopes).
.. [4] G. D. Forney, "The Viterbi algorithm", Proc. IEEE 61(3), 1973.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from functools import lru_cache
from typing import Protocol

import numpy as np

from .baseband import Baseband, Envelope, moving_average, noise_density
from .marks import Marks, inside
from .symbols import CHARACTER, ELEMENT, HELD_MARK_UNITS, WORD, Symbols, farnsworth_wpm
from .text import PATTERNS, decode

#: The noise band reading under this fraction of the noise sigma in the sequence
#: decision's spaces (over the whole recording) means a receiver's filter has cut it; it
#: is then calibrated to the spaces. Chance and missed marks move the ratio by a few
#: tens of per cent, not by almost half.
FILTERED_BAND_RATIO = 0.6
#: A mark's evidence is also taken with the carrier's phase held for this many dots at
#: a time only (drift, chirp), and the likelier of the two phase models counts.
BLOCK_UNITS = 1.0
#: Steps of the time lattice per dot.
STEPS_PER_UNIT = 6
#: Durations are searched over the mean ± this many standard deviations.
SPAN_SD = 3.5
#: Log-probability of a pause (a gap longer than any word gap), nats.
PAUSE_LOG_P = -8.0
#: Relative weight of a punctuation mark or procedural signal against a letter or figure
#: in the prior over characters (an assumption about the traffic, not a measured rate).
RARE_WEIGHT = 0.1
#: Half-width (standard deviation) of the amplitude tracking kernel, s.
AMPLITUDE_KERNEL_S = 0.5


# ---------------------------------------------------------------------------------------
# The pattern tree


@dataclass(frozen=True)
class _Tree:
    prefix: tuple[str, ...]  # node -> its pattern so far; node 0 is the root ""
    parent: np.ndarray  # shape (n_nodes,), node 0's parent is 0
    dash: np.ndarray  # shape (n_nodes,), bool: the node's last element is a dash
    complete: np.ndarray  # shape (n_nodes,), bool: the prefix is a pattern of the table
    internal: np.ndarray  # shape (n_nodes,), bool: some pattern continues it
    log_prior: np.ndarray  # shape (n_nodes,), log-probability of the character, complete


@lru_cache(maxsize=1)
def _tree() -> _Tree:
    prefixes = {""}
    for pattern in PATTERNS:
        for i in range(1, len(pattern) + 1):
            prefixes.add(pattern[:i])
    # the root, then the nodes reached by a dot, then those reached by a dash
    order = [""] + sorted((p for p in prefixes if p.endswith(".")), key=lambda p: (len(p), p))
    order += sorted((p for p in prefixes if p.endswith("-")), key=lambda p: (len(p), p))
    index = {p: i for i, p in enumerate(order)}
    parent = np.array([index[p[:-1]] if p else 0 for p in order])
    dash = np.array([p.endswith("-") for p in order])
    complete = np.array([p in PATTERNS for p in order])
    internal = np.array([any(q != p and q.startswith(p) for q in order) for p in order])
    weight = np.array([(1.0 if PATTERNS[p].isalnum() else RARE_WEIGHT) if p in PATTERNS
                       else 0.0 for p in order])
    with np.errstate(divide="ignore"):
        log_prior = np.log(weight / weight.sum())
    return _Tree(tuple(order), parent, dash, complete, internal, log_prior)


# ---------------------------------------------------------------------------------------
# Durations


@dataclass(frozen=True)
class Law:
    """Gaussian law of one class's duration, in units of the local dot."""

    mean: float
    sd: float

    def steps(self, k: int) -> np.ndarray:
        """The durations searched, in steps (at least 1)."""
        # nothing is shorter than half a dot (common practice: shorter is a glitch)
        lo = max(k // 2, int(math.floor((self.mean - SPAN_SD * self.sd) * k)))
        hi = max(lo, int(math.ceil((self.mean + SPAN_SD * self.sd) * k)))
        return np.arange(lo, hi + 1)

    def log_p(self, d: np.ndarray, k: int) -> np.ndarray:
        """Log-probability of each duration ``d`` in steps (density times the step)."""
        z = (d / k - self.mean) / self.sd
        return -0.5 * z * z - math.log(self.sd * k * math.sqrt(2 * math.pi))


@dataclass(frozen=True)
class Durations:
    """Duration laws of the five classes and how often a word gap ends a character."""

    dot: Law
    dash: Law
    element: Law
    character: Law
    word: Law
    p_word: float  # probability that a character is followed by a word gap


def _law(x: np.ndarray, nominal: float, *, floor_sd: float) -> Law:
    """Robust mean and spread of durations in units (median and scaled MAD)."""
    if x.size >= 3:
        mean = float(np.median(x))
        sd = 1.4826 * float(np.median(np.abs(x - mean)))
    elif x.size:
        mean, sd = float(np.mean(x)), 0.0
    else:
        mean, sd = nominal, 0.0
    return Law(mean=mean, sd=max(sd, floor_sd, 0.06 * mean))


def measure_durations(is_dash: np.ndarray, gap_class: np.ndarray, mark_units: np.ndarray,
                      gap_units: np.ndarray) -> Durations:
    """Duration laws from classified marks and gaps, lengths in local units.

    Parameters
    ----------
    is_dash : ndarray, shape (n,), bool
    gap_class : ndarray, shape (n - 1,), ELEMENT, CHARACTER or WORD
    mark_units, gap_units : ndarray, shapes (n,) and (n - 1,)
        Lengths in units of the local dot.

    Returns
    -------
    Durations
        Classes with no member take the ITU-R M.1677-1 lengths (1, 3; 1, 3, 7 units),
        scaled with the character gap where only that was seen (Farnsworth spacing).
    """
    dot = _law(mark_units[~is_dash], 1.0, floor_sd=0.1)
    dash = _law(mark_units[is_dash], 3.0, floor_sd=0.2)
    element = _law(gap_units[gap_class == ELEMENT], 1.0, floor_sd=0.1)
    char_units = gap_units[gap_class == CHARACTER]
    word_units = gap_units[(gap_class == WORD) & (gap_units < 40.0)]
    character = _law(char_units, 3.0, floor_sd=0.3)
    word = _law(word_units, 7.0 * character.mean / 3.0, floor_sd=0.7)
    if word.mean < character.mean + 2 * character.sd:  # keep the word gap apart
        word = Law(mean=max(word.mean, 7.0 * character.mean / 3.0), sd=word.sd)
    n_word, n_char = int(word_units.size), int(char_units.size)
    p_word = (n_word + 0.4) / (n_word + n_char + 2.0)  # 0.2 (five-letter groups) unseen
    return Durations(dot=dot, dash=dash, element=element, character=character, word=word,
                     p_word=float(np.clip(p_word, 0.05, 0.5)))


# ---------------------------------------------------------------------------------------
# Evidence


@dataclass(frozen=True)
class _Lattice:
    time_s: np.ndarray  # shape (T + 1,), time of each step boundary
    cumsum: np.ndarray  # shape (T + 1,), complex: baseband summed up to each boundary
    fs: float
    k: int


def _lattice(baseband: Baseband, unit_time_s: np.ndarray, unit_s: np.ndarray,
             k: int) -> _Lattice:
    """Step boundaries ``k`` per local dot, and the baseband's running sum at each."""
    fs = baseband.rate_hz
    z = baseband.samples
    n = z.size
    t_edges = baseband.start_s + (np.arange(n + 1) - 0.5) / fs  # sample k spans its edges
    u = np.interp(t_edges, unit_time_s, unit_s)
    phase = np.concatenate([[0.0], np.cumsum(k / u[:-1] / fs)])  # steps elapsed
    n_steps = int(math.floor(phase[-1]))
    time_s = np.interp(np.arange(n_steps + 1), phase, t_edges)
    c = np.concatenate([[0.0], np.cumsum(z.astype(np.complex128))])
    pos = (time_s - t_edges[0]) * fs
    cum = np.interp(pos, np.arange(n + 1), c.real) + 1j * np.interp(pos, np.arange(n + 1),
                                                                   c.imag)
    return _Lattice(time_s=time_s, cumsum=cum, fs=fs, k=k)


def _log_i0(x: np.ndarray) -> np.ndarray:
    from scipy.special import i0e

    return np.log(i0e(x)) + x


def mark_llr(y: np.ndarray, n_samples: np.ndarray, amplitude: np.ndarray,
             density: np.ndarray, rate_hz: float) -> np.ndarray:
    """Log-likelihood ratio of a mark against noise alone, from the baseband sum over it.

    Parameters
    ----------
    y : ndarray, complex
        Sum of the baseband over the interval.
    n_samples : ndarray
        Samples in the interval (may be fractional).
    amplitude : ndarray
        Carrier amplitude in the baseband, full scale.
    density : ndarray
        Two-sided noise density, full scale² per Hz.
    rate_hz : float
        Baseband rate, Hz.

    Returns
    -------
    ndarray
        ``ln I0(2 A |y| / (fs N0)) - L A² / (fs N0)`` (module notes, [3]_).

    Examples
    --------
    >>> round(float(mark_llr(np.array([0j]), np.array([10.0]), np.array([1.0]),
    ...                      np.array([0.1]), 100.0)[0]), 6)  # nothing there: -L A²/(fs N0)
    -1.0
    """
    fn0 = rate_hz * np.maximum(density, 1e-300)
    return _log_i0(2.0 * amplitude * np.abs(y) / fn0) - n_samples * amplitude**2 / fn0


@dataclass(frozen=True)
class _Track:
    """Carrier amplitude and noise density as functions of time."""

    time_s: np.ndarray
    amplitude: np.ndarray
    density: np.ndarray


def _sums(baseband: Baseband, start_s: np.ndarray, end_s: np.ndarray
          ) -> tuple[np.ndarray, np.ndarray]:
    fs = baseband.rate_hz
    z = baseband.samples
    c = np.concatenate([[0.0], np.cumsum(z.astype(np.complex128))])
    grid = np.arange(z.size + 1)
    p0 = (start_s - baseband.start_s) * fs + 0.5
    p1 = (end_s - baseband.start_s) * fs + 0.5
    c0 = np.interp(p0, grid, c.real) + 1j * np.interp(p0, grid, c.imag)
    c1 = np.interp(p1, grid, c.real) + 1j * np.interp(p1, grid, c.imag)
    return c1 - c0, np.maximum(p1 - p0, 1e-9)


def track_amplitude(baseband: Baseband, start_s: np.ndarray, end_s: np.ndarray,
                    time_s: np.ndarray, density: np.ndarray, *,
                    kernel_s: float = AMPLITUDE_KERNEL_S) -> np.ndarray:
    """Carrier amplitude in the baseband at ``time_s``, from marks believed to be keyed.

    Each mark's ``|y|² - L fs N0`` is an unbiased estimate of ``L² A²`` (module notes);
    around each time they are pooled with Gaussian weights of half-width ``kernel_s``.
    """
    if start_s.size == 0:
        return np.zeros(time_s.size)
    y, n = _sums(baseband, start_s, end_s)
    mid = 0.5 * (start_s + end_s)
    d_mid = np.interp(mid, time_s, density)
    num = np.abs(y) ** 2 - n * baseband.rate_hz * d_mid
    den = n * n
    # on a coarse grid of times (the amplitude moves slowly): each mark in its bin, then
    # the Gaussian kernel over the bins, then back to every time by interpolation
    step_s = kernel_s / 4
    grid = np.arange(time_s[0], time_s[-1] + step_s, step_s)
    where = np.clip(np.round((mid - grid[0]) / step_s).astype(np.int64), 0, grid.size - 1)
    kernel = np.exp(-0.5 * (np.arange(-16, 17) / 4.0) ** 2)  # +-4 half-widths
    # the centred part of the full convolution: as long as the grid even when the grid is
    # shorter than the kernel (where numpy's "same" would return the kernel's length)
    half = kernel.size // 2
    smooth = [np.convolve(np.bincount(where, weights=v, minlength=grid.size), kernel)
              [half : half + grid.size] for v in (num, den, np.ones(num.size))]
    a2 = smooth[0] / np.maximum(smooth[1], 1e-300)
    strong = np.sqrt(np.maximum(a2, 0.0))
    # far from every mark the weights vanish: hold the global estimate there
    whole = math.sqrt(max(float(num.sum() / den.sum()), 0.0))
    strong = np.where(smooth[2] > 0.05, strong, whole)
    return np.interp(time_s, grid, strong)


# ---------------------------------------------------------------------------------------
# Viterbi over the lattice


@dataclass(frozen=True)
class Segment:
    """One decided mark or gap, in lattice steps."""

    start: int
    end: int
    is_mark: bool
    kind: int  # marks: 0 dot, 1 dash; gaps: ELEMENT, CHARACTER or WORD
    node: int  # marks: the tree node the mark reached


def _mark_llrs(lat: _Lattice, track: _Track, d: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Ratio of a mark of each duration ``d`` ending at each step ``t``: (len(t), len(d)).

    -inf where the mark would begin before the lattice or end outside it.
    """
    n_t = lat.time_s.size
    t = t.reshape(-1, 1)
    a = t - d[None, :]
    ok = (a >= 0) & (t < n_t)
    a = np.clip(a, 0, n_t - 1)
    t = np.clip(t, 0, n_t - 1)
    mid = 0.5 * (lat.time_s[t] + lat.time_s[a])
    amp = np.interp(mid, track.time_s, track.amplitude)
    den = np.interp(mid, track.time_s, track.density)
    y = lat.cumsum[t] - lat.cumsum[a]
    n = (lat.time_s[t] - lat.time_s[a]) * lat.fs
    held = mark_llr(y, n, amp, den, lat.fs)
    # the phase held for BLOCK_UNITS (b steps) at a time: the sum of the blocks' ratios,
    # each from the baseband summed over its block (module notes). Counted back from the
    # mark's end, the whole blocks of every duration ending at a step are the same ones,
    # so their ratios are summed once along each chain of steps b apart, and only the
    # part block at the mark's start depends on the duration
    b = max(1, int(round(BLOCK_UNITS * lat.k)))
    m = d[None, :] // b  # whole blocks
    lo_span = max(int(np.min(t)) - int(np.max(d)) - b, 0)
    hi_span = int(np.max(t)) + 1
    steps = np.arange(lo_span, hi_span)
    first = np.clip(steps - b, 0, n_t - 1)
    y0 = lat.cumsum[steps] - lat.cumsum[first]
    n0 = np.maximum((lat.time_s[steps] - lat.time_s[first]) * lat.fs, 1e-9)
    mid0 = 0.5 * (lat.time_s[steps] + lat.time_s[first])
    block = np.where(steps >= b, mark_llr(y0, n0, np.interp(mid0, track.time_s,
                                                            track.amplitude),
                                          np.interp(mid0, track.time_s, track.density),
                                          lat.fs), 0.0)
    # chain[i] = block[i] + block[i - b] + ...: a running sum down the columns of rows b long
    rows = -(-block.size // b)
    chain = np.cumsum(np.pad(block, (0, rows * b - block.size)).reshape(rows, b),
                      axis=0).ravel()[: block.size]
    cut = t - m * b  # where the whole blocks begin
    whole = chain[t - lo_span] - np.where(cut - lo_span >= 0,
                                          chain[np.clip(cut - lo_span, 0, None)], 0.0)
    y = lat.cumsum[cut] - lat.cumsum[a]
    n = (lat.time_s[cut] - lat.time_s[a]) * lat.fs
    part = np.where(cut > a, mark_llr(y, np.maximum(n, 1e-9), amp, den, lat.fs), 0.0)
    blocks = whole + part
    return np.where(ok, np.maximum(held, blocks), -np.inf)


def _segment_llrs(lat: _Lattice, track: _Track, marks: list[Segment]) -> np.ndarray:
    """The ratio of each decided mark, as the lattice scored it (:func:`_mark_llrs`)."""
    if not marks:
        return np.empty(0)
    ends = np.array([g.end for g in marks])
    d = np.array([g.end - g.start for g in marks])
    kinds, j = np.unique(d, return_inverse=True)
    return _mark_llrs(lat, track, kinds, ends)[np.arange(ends.size), j]


def _span(*ranges: np.ndarray) -> np.ndarray:
    return np.arange(min(int(r[0]) for r in ranges), max(int(r[-1]) for r in ranges) + 1)


def _law_on(d: np.ndarray, law: Law, k: int, extra: float = 0.0) -> np.ndarray:
    """Log-probability of the durations ``d`` under a law, -inf outside its searched range."""
    own = law.steps(k)
    return np.where((d >= own[0]) & (d <= own[-1]), law.log_p(d, k) + extra, -np.inf)


@dataclass(frozen=True)
class _Model:
    """Everything a Viterbi pass needs besides the evidence, in lattice steps."""

    k: int
    d_mark: np.ndarray  # every duration a dot or a dash may have
    lp_mark: np.ndarray  # shape (len(d_mark), 2): log-probability as a dot, as a dash
    d_el: np.ndarray
    lp_el: np.ndarray
    d_ch: np.ndarray
    lp_ch: np.ndarray  # the character gap's law and the chance that no word gap follows
    d_wd: np.ndarray
    lp_wd: np.ndarray
    p_min: int  # a pause is longer than any word gap
    block: int  # no segment is shorter
    pad: int  # no segment (nor the pause's look-back) is longer


def _model(durations: Durations, k: int) -> _Model:
    laws = durations
    d_mark = _span(laws.dot.steps(k), laws.dash.steps(k))
    lp_mark = np.stack([_law_on(d_mark, laws.dot, k), _law_on(d_mark, laws.dash, k)], -1)
    d_el, d_ch, d_wd = laws.element.steps(k), laws.character.steps(k), laws.word.steps(k)
    p_min = int(d_wd[-1]) + 1
    return _Model(k=k, d_mark=d_mark, lp_mark=lp_mark, d_el=d_el,
                  lp_el=laws.element.log_p(d_el, k),
                  d_ch=d_ch, lp_ch=laws.character.log_p(d_ch, k) + math.log(1 - laws.p_word),
                  d_wd=d_wd, lp_wd=laws.word.log_p(d_wd, k) + math.log(laws.p_word),
                  p_min=p_min, block=int(min(d_mark[0], d_el[0], d_ch[0], d_wd[0])),
                  pad=int(max(d_mark[-1], d_el[-1], d_ch[-1], p_min)))


#: The lattice is decoded in chunks of this many dots, side by side (one numpy operation
#: serves them all), each with this many dots of context on either side.
CHUNK_UNITS = 300
CONTEXT_UNITS = 40
#: At most this many chunks are decoded together (it bounds the memory).
MAX_CHUNKS = 48


def viterbi(lat: _Lattice, track: _Track, durations: Durations) -> tuple[list[Segment], float]:
    """Most likely sequence of segments over the lattice, and its score (module notes).

    The score is the log-likelihood ratio of the sequence against noise alone plus the
    log-probabilities of its durations and characters; 0 for no mark at all.

    Long lattices are cut into chunks that overlap by ``2 * CONTEXT_UNITS`` dots and
    are decoded side by side; each keeps the characters that begin in its own stretch,
    cut in the middle of a gap near the seam. Paths that differ that far back have
    long since merged (the survivors of a Viterbi decoder share their past beyond a few
    characters [4]_), so the chunks agree where they meet.
    """
    model = _model(durations, lat.k)
    k = lat.k
    n_t = lat.time_s.size
    own = CHUNK_UNITS * k
    context = max(CONTEXT_UNITS * k, 2 * model.pad)
    if n_t <= own + 2 * context:
        starts, width, own, context = np.array([0]), n_t, n_t, 0
    else:
        starts = np.arange(0, n_t, own) - context
        width = own + 2 * context
    chunks: list[list[Segment]] = []
    for first in range(0, starts.size, MAX_CHUNKS):
        batch = starts[first : first + MAX_CHUNKS]
        idx = batch[:, None] + np.arange(width)[None, :]
        llr = _mark_llrs(lat, track, model.d_mark, idx).reshape(*idx.shape, -1)
        s = (llr[..., None] + model.lp_mark).astype(np.float32)  # no mark outside: -inf
        for start, segs in zip(batch, _viterbi_chunks(s, model), strict=True):
            chunks.append([Segment(g.start + start, g.end + start, g.is_mark, g.kind, g.node)
                           for g in segs])
    segments = chunks[0] if len(chunks) == 1 else _stitch(chunks, own, context, model)
    if not segments:
        return [], 0.0
    return segments, _path_score(segments, lat, track, model)


def _characters(segments: list[Segment]) -> list[tuple[list[Segment], Segment | None]]:
    """A decode cut into characters: their marks and element gaps, and the gap after."""
    out: list[tuple[list[Segment], Segment | None]] = []
    current: list[Segment] = []
    for seg in segments:
        if seg.is_mark or seg.kind == ELEMENT:
            current.append(seg)
        else:
            out.append((current, seg))
            current = []
    if current:
        out.append((current, None))
    return out


def _stitch(chunks: list[list[Segment]], own: int, context: int, model: _Model
            ) -> list[Segment]:
    """One decode from chunks decoded apart (see :func:`viterbi`)."""
    kept: list[tuple[list[Segment], Segment | None, int]] = []
    lo = -math.inf
    for c, segs in enumerate(chunks):
        chars = _characters(segs)
        hi = math.inf
        if c < len(chunks) - 1:
            seam = (c + 1) * own
            gaps = [g for _, g in chars if g is not None
                    and abs(0.5 * (g.start + g.end) - seam) <= context / 2]
            if gaps:
                best = min(gaps, key=lambda g: abs(0.5 * (g.start + g.end) - seam))
                hi = 0.5 * (best.start + best.end)
            else:
                hi = seam
        for marks, gap in chars:
            begin = marks[0].start
            if lo <= begin < hi and (not kept or begin > kept[-1][0][-1].end):
                kept.append((marks, gap, c))
        lo = hi
    out: list[Segment] = []
    for i, (marks, gap, c) in enumerate(kept):
        out.extend(marks)
        if i + 1 == len(kept):
            break
        nxt = kept[i + 1][0][0]
        if gap is not None and kept[i + 1][2] == c and gap.end == nxt.start:
            out.append(gap)
            continue
        # a seam: the gap between the chunks' characters, classed by its length
        d = nxt.start - marks[-1].end
        ch = np.interp(d, model.d_ch, model.lp_ch, left=-np.inf, right=-np.inf)
        wd = np.interp(d, model.d_wd, model.lp_wd, left=-np.inf, right=-np.inf)
        kind = WORD if (wd > ch or d > model.d_wd[-1]) else CHARACTER
        out.append(Segment(marks[-1].end, nxt.start, False, kind, 0))
    return out


def _path_score(segments: list[Segment], lat: _Lattice, track: _Track, model: _Model
                ) -> float:
    """Score of a decode as :func:`viterbi` counts it."""
    tree = _tree()
    total = 0.0
    marks = [g for g in segments if g.is_mark]
    ends = np.array([g.end for g in marks])
    j = np.clip(np.array([g.end - g.start for g in marks]) - model.d_mark[0], 0,
                model.d_mark.size - 1)
    llr = _mark_llrs(lat, track, model.d_mark, ends)[np.arange(ends.size), j]
    total += float(np.sum(llr + model.lp_mark[j, [g.kind for g in marks]]))
    for seg in segments:
        d = seg.end - seg.start
        if seg.is_mark:
            continue
        table = {ELEMENT: (model.d_el, model.lp_el), CHARACTER: (model.d_ch, model.lp_ch),
                 WORD: (model.d_wd, model.lp_wd)}[seg.kind]
        if seg.kind == WORD and d > table[0][-1]:
            total += PAUSE_LOG_P
        else:
            total += float(np.interp(d, table[0], table[1]))
    for marks, _ in _characters(segments):
        total += float(tree.log_prior[marks[-1].node])
    return total


def _viterbi_chunks(s_chunk: np.ndarray, model: _Model) -> list[list[Segment]]:
    """Viterbi over several chunks at once: ``s_chunk`` (chunks, steps, durations, 2).

    The forward pass keeps only the best scores, the nodes last so that every maximum
    over durations combines contiguous rows; the back-track finds again the few choices
    it needs.
    """
    tree = _tree()
    n_c, n_t = s_chunk.shape[:2]
    d_mark, d_el, d_ch, d_wd = model.d_mark, model.d_el, model.d_ch, model.d_wd
    lp_el = model.lp_el.astype(np.float32)[:, None]
    lp_ch = model.lp_ch.astype(np.float32)
    lp_wd = model.lp_wd.astype(np.float32)
    p_min, block, pad = model.p_min, model.block, model.pad
    n_nodes = len(tree.prefix)
    inner = np.flatnonzero(tree.internal & (np.arange(n_nodes) > 0))  # element gap states
    n_in = inner.size
    full = np.flatnonzero(tree.complete)
    prior = tree.log_prior[full].astype(np.float32)
    mark_nodes = np.arange(1, n_nodes)
    n_dot = int(np.count_nonzero(~tree.dash[mark_nodes]))
    assert not tree.dash[1 : 1 + n_dot].any() and tree.dash[1 + n_dot :].all()
    # the gap state each mark node leaves from: 0 the root, 1 + i the inner node i
    gap_pos = np.full(n_nodes, -1)
    gap_pos[0] = 0
    gap_pos[inner] = 1 + np.arange(n_in)
    par = gap_pos[tree.parent[mark_nodes]]
    rows = pad + n_t
    neg = np.float32(-np.inf)
    # best scores of paths ending at each step (the middle axis) with:
    m_all = np.full((n_c, rows, n_nodes - 1), neg, dtype=np.float32)  # a mark at the node
    m_inner = np.full((n_c, rows, n_in), neg, dtype=np.float32)  # the same, inner nodes
    # a gap at the parent of each dot node, of each dash node
    g_dot = np.full((n_c, rows, n_dot), neg, dtype=np.float32)
    g_dash = np.full((n_c, rows, n_nodes - 1 - n_dot), neg, dtype=np.float32)
    c_score = np.full((n_c, rows), neg, dtype=np.float32)  # a completed character
    c_best = np.full((n_c, rows), neg, dtype=np.float32)  # its running maximum, for pauses
    c_best_at = np.zeros((n_c, rows), dtype=np.int64)
    lane = np.arange(block)
    off_el = lane[:, None] - d_el[None, :]
    off_ch = lane[:, None] - d_ch[None, :]
    off_wd = lane[:, None] - d_wd[None, :]
    # a dot node takes the durations a dot may have, a dash node those of a dash
    j_dot = np.flatnonzero(np.isfinite(model.lp_mark[:, 0]))
    j_dash = np.flatnonzero(np.isfinite(model.lp_mark[:, 1]))
    off_dot = lane[:, None] - d_mark[None, j_dot]
    off_dash = lane[:, None] - d_mark[None, j_dash]
    g_all = np.empty((n_c, block, n_in + 1), dtype=np.float32)
    options = np.empty((4, n_c, block), dtype=np.float32)
    options[0] = 0.0
    inner_col = inner - 1
    full_col = full - 1
    s_dot = np.ascontiguousarray(s_chunk[:, :, j_dot, 0])[..., None]  # (chunks, steps, d, 1)
    s_dash = np.ascontiguousarray(s_chunk[:, :, j_dash, 1])[..., None]
    par_dot, par_dash = par[:n_dot], par[n_dot:]
    for t0 in range(pad, rows, block):
        b = min(block, rows - t0)
        r = slice(t0, t0 + b)
        # gaps: element gaps keep the node; the root takes character and word gaps, pauses
        g_all[:, :b, 1:] = (np.take(m_inner, t0 + off_el[:b], axis=1) + lp_el).max(axis=2)
        options[1, :, :b] = (np.take(c_score, t0 + off_ch[:b], axis=1) + lp_ch).max(axis=2)
        options[2, :, :b] = (np.take(c_score, t0 + off_wd[:b], axis=1) + lp_wd).max(axis=2)
        options[3, :, :b] = c_best[:, t0 - p_min : t0 - p_min + b] + PAUSE_LOG_P
        g_all[:, :b, 0] = options[:, :, :b].max(axis=0)
        g_dot[:, r] = g_all[:, :b, par_dot]
        g_dash[:, r] = g_all[:, :b, par_dash]
        # marks: one step down the tree from the node the gap before them left
        m = np.concatenate([
            (np.take(g_dot, t0 + off_dot[:b], axis=1)  # (chunks, b, durations, nodes)
             + s_dot[:, t0 - pad : t0 - pad + b]).max(axis=2),
            (np.take(g_dash, t0 + off_dash[:b], axis=1)
             + s_dash[:, t0 - pad : t0 - pad + b]).max(axis=2)], axis=2)
        m_all[:, r] = m
        m_inner[:, r] = m[:, :, inner_col]
        c = (m[:, :, full_col] + prior).max(axis=2)
        c_score[:, r] = c
        run = np.maximum.accumulate(np.concatenate([c_best[:, t0 - 1 : t0], c], axis=1),
                                    axis=1)[:, 1:]
        c_best[:, r] = run
        c_best_at[:, r] = np.maximum.accumulate(
            np.where(c >= run, t0 + lane[:b], c_best_at[:, t0 - 1 : t0]), axis=1)
    out = []
    for ci in range(n_c):
        end = int(np.argmax(c_score[ci]))
        if not np.isfinite(c_score[ci, end]) or c_score[ci, end] <= 0.0:
            out.append([])
            continue
        g_par = np.concatenate([g_dot[ci], g_dash[ci]], axis=1)
        out.append(_back_track(end, model, s_chunk[ci], m_all[ci], m_inner[ci], g_par,
                               c_score[ci], c_best[ci], c_best_at[ci], gap_pos, full,
                               prior))
    return out


def _back_track(end, model, s, m_all, m_inner, g_par, c_score, c_best, c_best_at, gap_pos,
                full, prior) -> list[Segment]:
    """The best path that ends with a character at step ``end``, choice by choice."""
    tree = _tree()
    pad = model.pad
    segments: list[Segment] = []
    state, t, node = "c", end, 0
    while True:
        if state == "c":
            node = int(full[np.argmax(m_all[t, full - 1] + prior)])
            state = "m"
        elif state == "m":
            d = model.d_mark
            j = int(np.argmax(g_par[t - d, node - 1] + s[t - pad, :, int(tree.dash[node])]))
            segments.append(Segment(t - int(d[j]) - pad, t - pad, True, int(tree.dash[node]),
                                    node))
            t, node, state = t - int(d[j]), int(tree.parent[node]), "g"
        elif node:  # element gap
            d = model.d_el
            j = int(np.argmax(m_inner[t - d, gap_pos[node] - 1] + model.lp_el))
            segments.append(Segment(t - int(d[j]) - pad, t - pad, False, ELEMENT, node))
            t, state = t - int(d[j]), "m"
        else:
            ch = c_score[t - model.d_ch] + model.lp_ch
            wd = c_score[t - model.d_wd] + model.lp_wd
            options = [0.0, float(ch.max()), float(wd.max()),
                       float(c_best[t - model.p_min]) + PAUSE_LOG_P]
            how = int(np.argmax(np.array(options, dtype=np.float32)))
            if how == 0:
                break
            if how == 3:
                before = int(c_best_at[t - model.p_min])
            elif how == 1:
                before = t - int(model.d_ch[np.argmax(ch)])
            else:
                before = t - int(model.d_wd[np.argmax(wd)])
            segments.append(Segment(before - pad, t - pad, False,
                                    CHARACTER if how == 1 else WORD, 0))
            t, state = before, "c"
    segments.reverse()
    return segments


# ---------------------------------------------------------------------------------------
# The decoder


def _robust_unit_track(time_s: np.ndarray, unit_s: np.ndarray, dot_s: float
                       ) -> np.ndarray:
    """A unit track kept within 40 % of the recording's unit and smoothed."""
    u = np.clip(unit_s, dot_s / 1.4, dot_s * 1.4)
    if u.size < 5:
        return np.full(u.size, float(np.median(u)) if u.size else dot_s)
    half = 7
    pad = np.pad(u, half, mode="edge")
    return np.median(np.lib.stride_tricks.sliding_window_view(pad, 2 * half + 1), axis=1)


def _classes_in_units(start_s, end_s, is_dash, gap_class, time_s, unit_s):
    local_m = np.interp(0.5 * (start_s + end_s), time_s, unit_s)
    mark_units = (end_s - start_s) / local_m
    if start_s.size > 1:
        local_g = np.interp(0.5 * (end_s[:-1] + start_s[1:]), time_s, unit_s)
        gap_units = (start_s[1:] - end_s[:-1]) / local_g
    else:
        gap_units = np.empty(0)
    return mark_units, gap_units


def _speed_from_decision(start_s, end_s, is_dash, gap_class, time_s, unit_s):
    """Unit track re-measured on a decision.

    A dot and the element gap after it span 2 units whatever the weighting (as in
    :mod:`okdecode.symbols`): they set the scale. A dash and its gap span ``r + 1``
    units for a dash/dot ratio ``r`` the operator keeps, so they follow changes of
    speed relative to their own median.
    """
    pair = gap_class == ELEMENT
    dot_pair = pair & ~is_dash[:-1]
    if dot_pair.sum() < 3:
        return time_s, unit_s
    span = start_s[1:][pair] - start_s[:-1][pair]
    at = start_s[:-1][pair]
    dash = is_dash[:-1][pair]
    local = np.interp(at, time_s, unit_s)
    units = span / local
    units[~dash] /= 2.0
    if dash.sum() >= 3:
        # the dashes' spans in units of the dot pairs' scale
        units[dash] *= np.median(units[~dash]) / np.median(units[dash])
    else:
        units[dash] = np.median(units[~dash])
    half = 7
    pad = np.pad(units, half, mode="edge")
    smooth = np.median(np.lib.stride_tricks.sliding_window_view(pad, 2 * half + 1), axis=1)
    return at, local * smooth


def _confidences(segments: list[Segment], mark_llrs: np.ndarray, durations: Durations,
                 k: int) -> tuple[np.ndarray, np.ndarray]:
    marks = [s for s in segments if s.is_mark]
    gaps = [s for s in segments if not s.is_mark]
    present = 1.0 / (1.0 + np.exp(-np.clip(mark_llrs, -50, 50)))
    m_conf = np.empty(len(marks))
    for i, s in enumerate(marks):
        d = np.array([s.end - s.start])
        lp = np.array([durations.dot.log_p(d, k)[0], durations.dash.log_p(d, k)[0]])
        p = np.exp(lp - lp.max())
        m_conf[i] = present[i] * p[s.kind] / p.sum()
    g_conf = np.empty(len(gaps))
    pw = durations.p_word
    for i, s in enumerate(gaps):
        d = np.array([s.end - s.start])
        # an element gap is about as likely as a character boundary (common practice)
        lp = np.array([durations.element.log_p(d, k)[0] + math.log(0.5),
                       durations.character.log_p(d, k)[0] + math.log(0.5 * (1 - pw)),
                       durations.word.log_p(d, k)[0] + math.log(0.5 * pw)])
        if d[0] > durations.word.steps(k)[-1]:
            lp[2] = max(lp[2], 0.0)  # a pause is a word break beyond doubt
        p = np.exp(lp - lp.max())
        which = {ELEMENT: 0, CHARACTER: 1, WORD: 2}[s.kind]
        g_conf[i] = p[which] / p.sum()
    return m_conf, g_conf


#: Largest chance that noise made the keying line, for :func:`line_unit_s`'s speed to
#: be used.
LINE_MAX_P = 0.02
#: Independent tries per bin of the keying line search: measured on 450 records of noise
#: alone (25 and 100 s) with one try per bin, P(p <= 0.01) was 0.07 to 0.09 and
#: P(p <= 0.001) 0.017 to 0.027.
LINE_TRIES = 20.0
#: Speeds the threshold path may report for its speed to be tried, WPM.
PLAUSIBLE_WPM = (4.0, 60.0)
#: Share of key-down time in typical text (the word PARIS: 22 of its 50 units).
DUTY = 0.44


def line_unit_s(baseband: Baseband, *, min_wpm: float = 5.0, max_wpm: float = 50.0
                ) -> tuple[float | None, float]:
    """The dot length from the keying line in the spectrum of the rising edges, s.

    Parameters
    ----------
    baseband : Baseband
    min_wpm, max_wpm : float
        Speeds searched, WPM.

    Returns
    -------
    (float or None, float)
        The dot length, s (None without a line inside the band searched), and the
        probability that noise alone would give a line as strong somewhere in the band.

    Notes
    -----
    In code keyed to ITU-R M.1677-1 timing every mark begins an even number of units
    after the one before it (a dot and its gap are 2 units, a dash and its gap 4, and
    the 3 and 7 unit gaps follow a 1 or 3 unit mark), while marks end an odd number of
    units later. The rising edges of the power envelope therefore repeat with a period
    of two dots, and their spectrum holds lines at odd multiples of ``1 / (2 dot)``.
    The search maximises the power at the first of them plus that at the third, the
    latter counted up to the former (``P(f) + min(P(f), P(3f))``), which no multiple or
    fraction of the true period does. Over a whole message the line is far narrower
    and stronger than any duration histogram, so it holds the speed well below the
    level where the threshold path stops finding the marks. Jitter and speed changes
    smear it, and the threshold path's speed is used.

    For noise alone each bin's power is exponential with a mean ``mu``; for two such
    bins ``X`` and ``Y`` over ``mu``, ``X + min(X, Y)`` exceeds ``x`` with probability
    ``(1 + x / 2) e^{-x}`` (median 1.146); with ``n`` independent bins in the band (its
    width times the duration) the chance that the largest exceeds it is at most ``n``
    times that (the union bound). Measured on noise alone, that undercounts the tries
    some twentyfold (the spectrum is padded twofold, and the floor is itself measured),
    so ``n`` is taken ``LINE_TRIES`` times larger.
    """
    found = _lines(baseband, min_wpm=min_wpm, max_wpm=max_wpm, n_lines=1)
    return found[0] if found else (None, 1.0)


def _lines(baseband: Baseband, *, min_wpm: float, max_wpm: float, n_lines: int
           ) -> list[tuple[float, float]]:
    """The ``n_lines`` strongest keying lines at least 10 % apart, strongest first."""
    z = baseband.samples
    fs = baseband.rate_hz
    step = max(1, int(fs // 200))  # the edges' power is wanted up to about 70 Hz
    n = max(1, int(round(0.005 * fs)))
    p = np.abs(moving_average(z, n)) ** 2
    if step > 1:
        m = p.size // step
        p = p[: m * step].reshape(m, step).mean(axis=1)
    rate = fs / step
    if p.size < 64:
        return []
    rise = np.maximum(np.diff(p), 0.0)
    rise -= rise.mean()
    n_fft = 1 << int(math.ceil(math.log2(2 * rise.size)))
    power = np.abs(np.fft.rfft(rise, n_fft)) ** 2
    f = np.fft.rfftfreq(n_fft, 1.0 / rate)
    band = (f >= 1.0 / (2 * 1.2 / min_wpm)) & (f <= 1.0 / (2 * 1.2 / max_wpm))
    if not band.any() or 3 * f[band][-1] >= rate / 2:
        return []
    # the third harmonic counts only as far as the first is as strong: a noise peak at a
    # third of the line's frequency must not borrow the line as its "harmonic"
    score = power[band] + np.minimum(power[band], np.interp(3 * f[band], f, power))
    fb = f[band]
    # the floor around a line: the median over half-hertz pieces of the band (the random
    # keying's own spectrum is not flat); see the notes for its 1.146 mu
    n_piece = max(8, int(0.5 / (f[1] - f[0])))
    n_pieces = max(1, score.size // n_piece)
    pieces = score[: n_pieces * n_piece].reshape(n_pieces, n_piece)
    centres = fb[: n_pieces * n_piece].reshape(n_pieces, n_piece).mean(axis=1)
    floor = np.median(pieces, axis=1) / 1.146
    n_bins = LINE_TRIES * (fb[-1] - fb[0]) * rise.size / rate
    found: list[tuple[float, float]] = []
    for _ in range(n_lines):
        i = int(np.argmax(score))
        f0 = float(fb[i])
        if not np.isfinite(score[i]) or not 1.03 * fb[0] < f0 < fb[-1] / 1.03:
            break  # at an edge: no line inside
        x = float(score[i] / max(float(np.interp(f0, centres, floor)), 1e-300))
        found.append((1.0 / (2.0 * f0), min(1.0, n_bins * (1.0 + x / 2.0) * math.exp(-x))))
        score = np.where(np.abs(np.log(fb / f0)) < math.log(1.1), -np.inf, score)
    return found


@dataclass(frozen=True)
class _Decision:
    start_s: np.ndarray
    end_s: np.ndarray
    is_dash: np.ndarray
    gap_class: np.ndarray


@dataclass(frozen=True)
class _Pass:
    segments: list[Segment]
    score: float
    lattice: _Lattice
    durations: Durations
    track: _Track
    decision: _Decision
    unit_track: tuple[np.ndarray, np.ndarray]


def _power_amplitude(baseband: Baseband, t_s: np.ndarray, density: np.ndarray,
                     unit_s: float) -> np.ndarray:
    """Carrier amplitude from the baseband's power alone.

    After a moving average of ``n`` samples (a quarter dot), noise has the power
    ``fs N0 / n`` and a keyed carrier ``A²`` for the share ``DUTY`` of the time, so a
    long mean of the power gives ``A² = (P - fs N0 / n) / DUTY``.
    """
    fs = baseband.rate_hz
    n = max(8, int(round(0.25 * unit_s * fs)))
    y = moving_average(baseband.samples, n)
    p = y.real**2 + y.imag**2
    m = max(1, int(round(4 * AMPLITUDE_KERNEL_S * fs)))
    excess = moving_average(p, m).real - fs * density / n
    return np.sqrt(np.maximum(excess, 0.0) / DUTY)


def _pass(baseband: Baseband, t_s: np.ndarray, density: np.ndarray,
          unit_track: tuple[np.ndarray, np.ndarray], decision: _Decision | None, k: int
          ) -> _Pass | None:
    """One Viterbi pass with speed, amplitude and durations measured on a decision
    (nominal durations and the power's amplitude without one)."""
    unit_time_s, unit_s = unit_track
    lat = _lattice(baseband, unit_time_s, unit_s, k)
    if decision is None:
        empty = np.empty(0)
        durations = measure_durations(np.zeros(0, bool), np.zeros(0, int), empty, empty)
        amp = _power_amplitude(baseband, t_s, density, float(np.median(unit_s)))
    else:
        mark_units, gap_units = _classes_in_units(decision.start_s, decision.end_s,
                                                  decision.is_dash, decision.gap_class,
                                                  unit_time_s, unit_s)
        durations = measure_durations(decision.is_dash, decision.gap_class, mark_units,
                                      gap_units)
        amp = track_amplitude(baseband, decision.start_s, decision.end_s, t_s, density)
    track = _Track(time_s=t_s, amplitude=amp, density=density)
    segments, score = viterbi(lat, track, durations)
    if not segments:
        return None
    m = [s for s in segments if s.is_mark]
    g = [s for s in segments if not s.is_mark]
    start_s = lat.time_s[[s.start for s in m]]
    end_s = lat.time_s[[s.end for s in m]]
    found = _Decision(start_s, end_s, np.array([s.kind == 1 for s in m]),
                      np.array([s.kind for s in g], dtype=int))
    new_track = _speed_from_decision(found.start_s, found.end_s, found.is_dash,
                                     found.gap_class, unit_time_s, unit_s)
    return _Pass(segments, score, lat, durations, track, found, new_track)


def _same(a: _Decision, b: _Decision, *, step_s: float) -> bool:
    """Whether two decisions have the same classes and edges within two steps."""
    return (a.start_s.size == b.start_s.size and bool(np.all(a.is_dash == b.is_dash))
            and bool(np.all(a.gap_class == b.gap_class))
            and bool(np.all(np.abs(a.start_s - b.start_s) < 2 * step_s))
            and bool(np.all(np.abs(a.end_s - b.end_s) < 2 * step_s)))


def refine(baseband: Baseband, envelope: Envelope, marks: Marks, symbols: Symbols, *,
           source: str) -> tuple[Marks, Symbols]:
    """Decide marks and classes again on the whole sequence (module notes).

    Parameters
    ----------
    baseband : Baseband
        The fine-tuned baseband, carrier at 0 Hz.
    envelope : Envelope
        The threshold path's matched envelope (its noise measurement is used).
    marks : Marks
        The threshold path's marks: the start for the amplitude track; their ``levels``
        are kept.
    symbols : Symbols
        The threshold path's classes: the start for the speed and the duration laws.
    source : str
        Named in the results.

    Returns
    -------
    (Marks, Symbols)
        The same kinds of results as the threshold path's, so :func:`okdecode.text.decode`
        reads them as it reads those; with the inputs unchanged when the threshold path
        found no speed or fewer than two marks, or when no sequence of marks is likelier
        than noise alone.

    Examples
    --------
    >>> from okdecode.receiver import decode_array
    >>> from okdecode.synth import synth
    >>> rec = synth("XQ7ZB", wpm=20, cn0_dbhz=30.0, seed=1)
    >>> r = decode_array(rec.samples, rec.rate_hz)
    >>> found, syms = refine(r.baseband, r.envelope, r.marks, r.symbols, source="x")
    >>> decode(syms).text, found.n_marks
    ('XQ7ZB', 21)
    """
    if symbols.dot_s is None or symbols.n_marks < 2 or baseband.samples.size < 16:
        return marks, symbols
    k = STEPS_PER_UNIT
    fs = baseband.rate_hz
    t_s = baseband.start_s + np.arange(baseband.samples.size) / fs
    if envelope.noise_sigma is not None and envelope.noise_sigma.size:
        # the envelope's Rayleigh sigma is that of noise of density N0 in its bandwidth B:
        # sigma² = N0 B / 2 (see okdecode.baseband.envelope)
        density = np.interp(t_s, envelope.time_s,
                            2.0 * envelope.noise_sigma**2 / envelope.noise_bandwidth_hz)
    else:
        density = noise_density(baseband)
    # a recording without noise (a generated float array) would give ratios past float32's
    # range: the noise is taken as at least 60 dB under the baseband's mean power
    z = baseband.samples
    floor = 1e-6 * float(np.mean(z.real.astype(np.float64) ** 2 + z.imag.astype(np.float64)
                                 ** 2)) / fs
    density = np.maximum(density, floor)
    dot_s = float(symbols.dot_s)
    held = (symbols.held_start_s, symbols.held_end_s)
    thr_track = (symbols.start_s, _robust_unit_track(symbols.start_s, symbols.local_dot_s,
                                                     dot_s))
    thr_decision = _Decision(symbols.start_s, symbols.end_s, symbols.is_dash,
                             symbols.gap_class)
    lines = _lines(baseband, min_wpm=PLAUSIBLE_WPM[0], max_wpm=50.0, n_lines=2)
    line_s, line_p = lines[0] if lines else (None, 1.0)
    if held[0].size:
        # a key held down is no element: blanked, the lattice reads it as a pause. Held
        # against the keying line's unit too, where that is sharp: a threshold path that
        # took far too short a unit finds "held" marks that are only dashes
        unit = max(dot_s, line_s) if line_s is not None and line_p <= LINE_MAX_P else dot_s
        long = (held[1] - held[0]) > HELD_MARK_UNITS * unit
        held = (held[0][long], held[1][long])
        baseband = _blank(baseband, t_s, held[0] - 0.5 * envelope.filter_s,
                          held[1] + 0.5 * envelope.filter_s)
    tries: list[tuple[tuple[np.ndarray, np.ndarray], _Decision | None]] = []
    ratio = line_s / dot_s if line_s else 1.0
    # a threshold path that has lost the signal reads noise as code far too fast or slow
    plausible = PLAUSIBLE_WPM[0] <= 1.2 / dot_s <= PLAUSIBLE_WPM[1]
    line_track = (np.array([0.0]), np.array([line_s or dot_s]))
    if line_s is None:
        tries.append((thr_track, thr_decision))
    elif not plausible:  # nothing to lose: the line, however weak, is all there is
        tries.append((line_track, None))
        if line_p > LINE_MAX_P and len(lines) > 1:  # a weak line: the next one too
            tries.append(((np.array([0.0]), np.array([lines[1][0]])), None))
    elif abs(math.log(ratio)) >= math.log(1.08):
        # the threshold path's speed and the keying line disagree: the likelier wins
        tries += [(thr_track, thr_decision), (line_track, None)]
    elif line_p <= LINE_MAX_P:
        # the same speed: the line's is the sharper measure of it
        scale = line_s / float(np.median(thr_track[1]))
        tries.append(((thr_track[0], thr_track[1] * scale), thr_decision))
    else:
        tries.append((thr_track, thr_decision))
    best = _decide(baseband, t_s, density, tries, k, dot_s, line_s, line_p)
    if best is None:
        return marks, symbols
    band_ratio = _band_to_spaces(envelope, best.decision, held)
    if band_ratio is not None and band_ratio < FILTERED_BAND_RATIO:
        # the noise band reads well under the noise in this decision's spaces, over the
        # whole recording: a receiver's narrow filter has cut it. Calibrated to the
        # spaces, the ratios of the marks are decided again
        density = density / band_ratio**2
        best = _decide(baseband, t_s, density, tries, k, dot_s, line_s, line_p) or best
    segments, durations, track = best.segments, best.durations, best.track
    start_s, end_s = best.decision.start_s, best.decision.end_s
    is_dash, gap_class = best.decision.is_dash, best.decision.gap_class
    unit_time_s, unit_s = best.unit_track
    llr = _segment_llrs(best.lattice, track, [g for g in segments if g.is_mark])
    m_conf, g_conf = _confidences(segments, llr, durations, k)
    start_s, end_s = _refine_edges(envelope, marks, start_s, end_s,
                                   reach_s=1.5 * dot_s / k)
    # the key-down intervals, the held ones among them
    all_start = np.concatenate([start_s, held[0]])
    order = np.argsort(all_start, kind="stable")
    all_start, all_end = all_start[order], np.concatenate([end_s, held[1]])[order]
    level, snr_db = _levels(envelope, marks, all_start, all_end)
    new_marks = Marks(start_s=all_start, end_s=all_end, level=level, peak_snr_db=snr_db,
                      levels=marks.levels, source=source)
    local = np.interp(start_s, unit_time_s, unit_s)
    unit = float(np.median(local))
    mark_units, gap_units = _classes_in_units(start_s, end_s, is_dash, gap_class,
                                              unit_time_s, unit_s)
    dots, dashes = mark_units[~is_dash], mark_units[is_dash]
    ratio = float(np.median(dashes) / np.median(dots)) if dots.size and dashes.size else None
    char_gaps = (start_s[1:] - end_s[:-1])[gap_class == CHARACTER]
    farns = bool(char_gaps.size and np.median(gap_units[gap_class == CHARACTER]) > 4.5)
    f_wpm = farnsworth_wpm(1.2 / unit, float(np.median(char_gaps))) if farns else None
    new_symbols = Symbols(start_s=start_s, end_s=end_s, is_dash=is_dash, gap_class=gap_class,
                          mark_confidence=m_conf, gap_confidence=g_conf, local_dot_s=local,
                          dot_s=unit, dash_dot_ratio=ratio, farnsworth=farns,
                          farnsworth_wpm=f_wpm, source=source, held_start_s=held[0],
                          held_end_s=held[1])
    return new_marks, new_symbols


def _blank(baseband: Baseband, t_s: np.ndarray, lo_s: np.ndarray, hi_s: np.ndarray
           ) -> Baseband:
    """The baseband with its samples inside the intervals [lo_s, hi_s] set to zero."""
    z = baseband.samples.copy()
    for a, b in zip(np.searchsorted(t_s, lo_s), np.searchsorted(t_s, hi_s), strict=True):
        z[a:b] = 0
    return replace(baseband, samples=z)


def _decide(baseband: Baseband, t_s: np.ndarray, density: np.ndarray, tries: list,
            k: int, dot_s: float, line_s: float | None, line_p: float) -> _Pass | None:
    """The likeliest of the passes started from ``tries``, measured again if it moved."""
    best, start = None, None
    for unit_track, decision in tries:
        result = _pass(baseband, t_s, density, unit_track, decision, k)
        if result is not None and (best is None or result.score > best.score):
            best, start = result, decision
    if best is None:
        return None
    if start is None or not _same(start, best.decision, step_s=dot_s / k):
        # measured on a decision that has changed: measure again on the new one
        unit_track = best.unit_track
        if line_s is not None and line_p <= LINE_MAX_P and abs(
                math.log(line_s / float(np.median(unit_track[1])))) < math.log(1.08):
            unit_track = (unit_track[0], unit_track[1] * line_s / np.median(unit_track[1]))
        again = _pass(baseband, t_s, density, unit_track, best.decision, k)
        if again is not None:
            best = again
    return best


def _band_to_spaces(envelope: Envelope, decision: _Decision,
                    held: tuple[np.ndarray, np.ndarray]) -> float | None:
    """The noise band's sigma over the one measured in a decision's spaces, or None.

    Both over the interiors of the gaps (half a filter length in from each mark, and
    away from the keys held down): the band's reading there against
    ``sqrt(mean(x**2) / 2)``, the maximum-likelihood Rayleigh sigma of the envelope.
    None without the band or with under 64 samples.
    """
    if envelope.noise_sigma is None or decision.start_s.size == 0:
        return None
    t, x = envelope.time_s, envelope.magnitude
    guard_s = 0.5 * envelope.filter_s + 2.0 / envelope.rate_hz
    key_on = np.concatenate([decision.start_s, held[0]])
    order = np.argsort(key_on)
    key_on, key_off = key_on[order], np.concatenate([decision.end_s, held[1]])[order]
    lo = np.concatenate([[-np.inf], key_off]) + guard_s
    hi = np.concatenate([key_on, [np.inf]]) - guard_s
    gaps = inside(t, lo, hi)
    if gaps.sum() < 64:
        return None
    spaces = math.sqrt(float(np.mean(x[gaps] ** 2)) / 2.0)
    band = math.sqrt(float(np.mean(envelope.noise_sigma[gaps] ** 2)))
    return band / spaces if spaces > 0 else None


def _refine_edges(envelope: Envelope, marks: Marks, start_s: np.ndarray, end_s: np.ndarray,
                  *, reach_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Edges moved from the lattice's steps to where the envelope crosses the threshold.

    The decision's edges lie on steps of a sixth of a dot. After the moving average
    matched to the dot, a mark's edge is where the envelope crosses halfway between the
    noise and the mark level, the threshold path's threshold (:mod:`okdecode.marks`);
    each edge moves to the crossing of the right direction nearest to it within
    ``reach_s``, found by linear interpolation between samples, and stays where no such
    crossing is (a mark the threshold path missed). Timing statistics and the level
    measurement then see the marks' true lengths, not lengths rounded to steps.
    """
    x, lv = envelope.magnitude, marks.levels
    if x.size < 2 or start_s.size == 0 or lv.time_s.size == 0:
        return start_s, end_s
    t = envelope.time_s
    over = x - np.interp(t, lv.time_s, lv.threshold)
    reach = max(1, int(math.ceil(reach_s * envelope.rate_hz)))
    offsets = np.arange(-reach, reach)

    def moved(edge_s: np.ndarray, rising: bool) -> np.ndarray:
        i0 = np.round((edge_s - envelope.start_s) * envelope.rate_hz).astype(np.int64)
        i = np.clip(i0[:, None] + offsets[None, :], 0, x.size - 2)
        a, b = over[i], over[i + 1]
        cross = (a < 0) & (b >= 0) if rising else (a >= 0) & (b < 0)
        frac = np.where(cross, a / np.where(a != b, a - b, 1.0), 0.0)
        at = t[i] + frac / envelope.rate_hz
        dist = np.where(cross, np.abs(at - edge_s[:, None]), np.inf)
        j = np.argmin(dist, axis=1)
        rows = np.arange(edge_s.size)
        ok = np.isfinite(dist[rows, j]) & (dist[rows, j] <= reach_s)
        return np.where(ok, at[rows, j], edge_s)

    new_start, new_end = moved(start_s, True), moved(end_s, False)
    # keep the order of the edges; a mark whose edges cross keeps the lattice's
    bad = new_end <= new_start
    bad[1:] |= new_start[1:] <= new_end[:-1]
    bad[:-1] |= new_start[1:] <= new_end[:-1]
    new_start, new_end = np.where(bad, start_s, new_start), np.where(bad, end_s, new_end)
    if np.any(new_end <= new_start) or np.any(new_start[1:] <= new_end[:-1]):
        return start_s, end_s
    return new_start, new_end


def _levels(envelope: Envelope, marks: Marks, start_s: np.ndarray, end_s: np.ndarray
            ) -> tuple[np.ndarray, np.ndarray]:
    """Mean envelope magnitude over each mark and its ratio to the noise floor, dB."""
    x = envelope.magnitude
    t = envelope.time_s
    i0 = np.clip(np.searchsorted(t, start_s), 0, x.size - 1)
    i1 = np.maximum(np.clip(np.searchsorted(t, end_s), 0, x.size), i0 + 1)
    c = np.concatenate([[0.0], np.cumsum(x)])
    level = (c[i1] - c[i0]) / (i1 - i0)
    noise = np.interp(0.5 * (start_s + end_s), marks.levels.time_s, marks.levels.noise)
    snr_db = 20 * np.log10(np.maximum(level, 1e-30) / np.maximum(noise, 1e-30))
    return level, snr_db


class Received(Protocol):
    """What :func:`decode_reception_text` reads of an :class:`okdecode.report.Reception`
    (named so, not imported: this module comes before the report)."""

    file: str
    text: str
    baseband: Baseband | None
    envelope: Envelope | None
    marks: Marks | None
    symbols: Symbols | None


def decode_reception_text(reception: Received) -> str:
    """Text of a threshold-path reception decoded again by :func:`refine`.

    Returns the reception's own text when it holds no baseband or marks.
    """
    r = reception
    if r.baseband is None or r.envelope is None or r.marks is None or r.symbols is None:
        return r.text
    found, syms = refine(r.baseband, r.envelope, r.marks, r.symbols, source=r.file)
    return decode(syms).text
