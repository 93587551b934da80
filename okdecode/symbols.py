"""Stage 3: Marks -> Symbols. Dot length, speed, dot/dash and gap classes, Farnsworth.

Method
------
*Unit.* The dot length ``u`` is first found by a grid search over 8 ms to 1.5 s for the
``u`` that best explains all durations on a log scale: marks as 1 or 3 units, spaces as
1 or 3 units or longer, with a capped squared error so that outliers (noise, pauses)
weigh little. It is then refined from the start-to-start time of a dot and the space
after it inside a character, which is 2 units whatever the keying weight or the
threshold's bias (both lengthen the mark by as much as they shorten the space), and,
once every mark and gap has its class, by a least-squares fit of all start-to-start
and end-to-end intervals inside words (:func:`_fit_unit`), which uses every edge.

*Speed.* ``wpm = 1.2 / u`` by the PARIS standard word of 50 units (common practice;
ITU-R M.1677-1 gives the 1:3 and 1:3:7 ratios). Slow changes are followed by a running
median of local unit estimates (11 elements), so classes are judged against the speed
in force. An abrupt change is found first (:func:`_local_reference`): windows of the
durations searched as the whole recording is, the change placed at the mark that best
splits the durations into the old unit and the new; each run of one speed then has its
own running median.

*Classes.* Marks split into dots and dashes at the geometric mean of the two clusters
found on log duration (2-means); spaces under 2 local units are element gaps, and the
rest split into character and word gaps by 2-means on log duration, or, where only one
cluster exists, by its length. Spaces longer than 20 units, and four times the median
of the longer spaces, are pauses (word breaks). Marks longer than 20 units are a key
held down, not elements: they are set aside (``held_start_s``, ``held_end_s``).
Character gaps longer than 4.5 units mean Farnsworth spacing; the overall speed then
follows from J. Bloom's relation (QEX, 1990): a PARIS word at character speed ``c`` and
overall speed ``s`` stretches its 19 units of character and word spacing to
``t_a = (60 c - 37.2 s) / (s c)`` seconds, so ``s = 60 c / (t_a c + 37.2)``.

*Confidence.* Each element's class is given a probability from its distance, in
standard deviations of its cluster, to the decision boundary (a Gaussian model of
timing error on log duration).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np

from .marks import Marks

#: Marks count as at most this many units (a word gap; common practice: no element of
#: the code comes near it) in the dot/dash clusters.
LONG_MARK_UNITS = 7.0
#: A mark longer than this many units (as long as a pause) is a key held down, not an
#: element.
HELD_MARK_UNITS = 20.0
#: A space longer than this many units is a pause between transmissions.
PAUSE_UNITS = 20.0
ELEMENT, CHARACTER, WORD = 1, 3, 7


def dot_s_from_wpm(wpm: float) -> float:
    """Length of one unit (a dot) at a keying speed.

    Parameters
    ----------
    wpm : float
        Speed in words per minute, finite and > 0.

    Returns
    -------
    float
        Dot length, s.

    Notes
    -----
    A dash is 3 units; the gaps are 1 unit inside a character, 3 between characters and
    7 between words [1]_. Speed counts the word "PARIS", 50 units with its word gap
    (common practice), so ``dot_s = 60 / (50 * wpm) = 1.2 / wpm``.

    References
    ----------
    .. [1] ITU-R Recommendation M.1677-1, "International Morse code", 2009.

    Examples
    --------
    >>> dot_s_from_wpm(20)
    0.06
    """
    return 1.2 / wpm


def farnsworth_wpm(char_wpm: float, char_gap_s: float) -> float:
    """Overall speed of Farnsworth-spaced code from its character speed and gap.

    Parameters
    ----------
    char_wpm : float
        Speed of the characters themselves, WPM.
    char_gap_s : float
        Length of one (stretched) character gap, s.

    Returns
    -------
    float
        Overall speed, WPM, by J. Bloom, QEX 1990: ``t_a = 19 * char_gap / 3``,
        ``s = 60 c / (t_a c + 37.2)``.

    Examples
    --------
    >>> round(farnsworth_wpm(20.0, 3 * 0.06), 3)  # no stretch: overall = character speed
    20.0
    """
    t_a = 19.0 * char_gap_s / 3.0
    return 60.0 * char_wpm / (t_a * char_wpm + 37.2)


@dataclass(frozen=True)
class Symbols:
    """Marks and spaces with their classes and the timing they imply."""

    start_s: np.ndarray  # shape (n,), mark starts, s
    end_s: np.ndarray  # shape (n,), mark ends, s
    is_dash: np.ndarray  # shape (n,), bool
    gap_class: np.ndarray  # shape (n - 1,), ELEMENT, CHARACTER or WORD
    mark_confidence: np.ndarray  # shape (n,), probability the mark's class is right
    gap_confidence: np.ndarray  # shape (n - 1,)
    local_dot_s: np.ndarray  # shape (n,), tracked unit at each mark, s
    dot_s: float | None  # the recording's unit, s; None with too few marks
    dash_dot_ratio: float | None
    farnsworth: bool
    farnsworth_wpm: float | None  # overall speed when Farnsworth-spaced
    source: str
    # marks longer than HELD_MARK_UNITS: a key held down (to tune, or stuck), not elements
    # of the code, so not in the arrays above; start and end, s
    held_start_s: np.ndarray = field(default_factory=lambda: np.empty(0))
    held_end_s: np.ndarray = field(default_factory=lambda: np.empty(0))

    @property
    def wpm(self) -> float | None:
        return None if self.dot_s is None else 1.2 / self.dot_s

    @property
    def n_marks(self) -> int:
        return int(self.start_s.size)


def _capped_cost(e: np.ndarray, cap: float) -> np.ndarray:
    return np.minimum(e * e, cap * cap)


def coarse_unit_s(marks_s: np.ndarray, spaces_s: np.ndarray) -> float | None:
    """Grid-search estimate of the unit from mark and space lengths (module notes), s."""
    if marks_s.size == 0:
        return None
    # a few thousand durations fix the unit; evenly spaced ones keep a long file's
    # search as cheap as a short one's
    marks_s, spaces_s = marks_s[:: 1 + marks_s.size // 2000], spaces_s[:: 1 + spaces_s.size // 2000]
    grid = _grid()
    durations = np.concatenate([marks_s, spaces_s])
    is_mark = np.arange(durations.size) < marks_s.size
    cost = _unit_costs(durations, is_mark, np.log(grid)[:, None]).sum(axis=1)
    return float(grid[int(np.argmin(cost))])


#: Durations (marks and spaces) per block of the local unit search, and blocks per window.
LOCAL_BLOCK, LOCAL_WINDOW = 16, 5
#: A window's own unit replaces the recording's when it is this far from it and explains
#: the window's durations with at most this fraction of the cost at the recording's unit.
LOCAL_MIN_RATIO, LOCAL_MAX_COST = 1.25, 0.6


def _unit_costs(durations: np.ndarray, is_mark: np.ndarray, lg: np.ndarray) -> np.ndarray:
    """Capped log-error cost of each duration at each grid unit, shape (grid, n)."""
    cap = math.log(1.8)
    ld = np.log(durations)[None, :] - lg
    e = np.minimum(np.abs(ld), np.abs(ld - math.log(3)))
    # any space of 4.5 units or more may be a (stretched) character or word gap
    e = np.where(~is_mark[None, :] & (ld > math.log(4.5)), 0.5 * cap, e)
    return _capped_cost(e, cap)


def _grid() -> np.ndarray:
    return np.exp(np.linspace(math.log(0.008), math.log(1.5), 400))


def _local_reference(marks_s: np.ndarray, spaces_s: np.ndarray, u0: float) -> np.ndarray:
    """The unit to judge each mark against: the recording's, or the local one (notes).

    The durations, in time order, are cut into blocks of ``LOCAL_BLOCK``; each window of
    ``LOCAL_WINDOW`` blocks is searched on the grid as :func:`coarse_unit_s` searches
    the whole recording. Where a window's own unit differs from ``u0`` by more than
    ``LOCAL_MIN_RATIO`` and explains its durations much better, an abrupt change of
    speed has happened, and the marks of its middle block are judged against it.
    """
    n = marks_s.size
    ref = np.full(n, u0)
    durations = np.empty(2 * n - 1)
    durations[0::2], durations[1::2] = marks_s, spaces_s
    n_blocks = -(-durations.size // LOCAL_BLOCK)
    if n_blocks < LOCAL_WINDOW or not np.all(durations > 0):
        return ref
    is_mark = np.zeros(durations.size, dtype=bool)
    is_mark[0::2] = True
    grid = _grid()
    lg = np.log(grid)[:, None]
    block_cost = np.zeros((grid.size, n_blocks))
    block_of = np.arange(durations.size) // LOCAL_BLOCK
    step = 256 * LOCAL_BLOCK  # bounded memory: 400 x 4096 costs at a time
    for lo in range(0, durations.size, step):
        sl = slice(lo, lo + step)
        cost = _unit_costs(durations[sl], is_mark[sl], lg)
        b = block_of[sl]
        block_cost[:, b[0]: b[-1] + 1] += np.add.reduceat(
            cost, np.flatnonzero(np.diff(b, prepend=b[0] - 1)), axis=1)
    c = np.cumsum(np.pad(block_cost, ((0, 0), (1, 0))), axis=1)
    half = LOCAL_WINDOW // 2
    lo_b = np.clip(np.arange(n_blocks) - half, 0, n_blocks - LOCAL_WINDOW)
    window = c[:, lo_b + LOCAL_WINDOW] - c[:, lo_b]
    best = np.argmin(window, axis=0)
    at_u0 = window[int(np.argmin(np.abs(np.log(grid / u0))))]
    cols = np.arange(n_blocks)
    local = grid[best]
    changed = (np.abs(np.log(local / u0)) > math.log(LOCAL_MIN_RATIO)) & (
        window[best, cols] < LOCAL_MAX_COST * at_u0)
    block_ref = np.where(changed, local, u0)
    # the mark where each change happens: between the blocks on either side of it, the
    # split that explains the durations best, the left ones at the old unit and the
    # right ones at the new
    ref_d = np.repeat(block_ref, LOCAL_BLOCK)[: durations.size]
    steps = np.flatnonzero(np.abs(np.diff(np.log(block_ref))) > math.log(LOCAL_MIN_RATIO))
    for i, k in enumerate(steps):
        a, b = block_ref[k], block_ref[k + 1]
        # a window holds LOCAL_WINDOW blocks, so the change may lie a few blocks either
        # side of the step; the search stops at the neighbouring steps
        lo = max(k - half, steps[i - 1] + 1 if i else 0) * LOCAL_BLOCK
        hi = min((k + half + 2) * LOCAL_BLOCK,
                 (steps[i + 1] + 1) * LOCAL_BLOCK if i + 1 < steps.size else durations.size,
                 durations.size)
        span = durations[lo:hi]
        cost = _unit_costs(span, is_mark[lo:hi], np.log(np.array([a, b]))[:, None])
        left = np.concatenate([[0.0], np.cumsum(cost[0])])
        right = np.concatenate([np.cumsum(cost[1][::-1])[::-1], [0.0]])
        # splits just before a mark (even positions of the interleaved durations)
        j = np.arange(0, span.size + 1)
        j = j[(lo + j) % 2 == 0]
        split = int(j[np.argmin((left + right)[j])])
        ref_d[lo: lo + split], ref_d[lo + split: hi] = a, b
    return ref_d[0::2]


def _two_means(v: np.ndarray, iters: int = 30) -> tuple[float, float, np.ndarray]:
    """1-D 2-means; returns the centres (low, high) and the labels (True = high)."""
    lo, hi = float(np.min(v)), float(np.max(v))
    if hi - lo < 1e-12:
        return lo, hi, np.zeros(v.size, dtype=bool)
    c = np.array([lo, hi])
    for _ in range(iters):
        lab = np.abs(v - c[1]) < np.abs(v - c[0])
        new = np.array([v[~lab].mean() if (~lab).any() else c[0],
                        v[lab].mean() if lab.any() else c[1]])
        if np.allclose(new, c):
            break
        c = new
    lab = np.abs(v - c[1]) < np.abs(v - c[0])
    return float(c[0]), float(c[1]), lab


def _running_median(v: np.ndarray, k: int) -> np.ndarray:
    if v.size <= 2:
        return np.full(v.size, np.median(v)) if v.size else v
    k = min(k, v.size if v.size % 2 else v.size - 1)
    half = k // 2
    pad = np.pad(v, half, mode="reflect" if v.size > half else "edge")
    return np.median(np.lib.stride_tricks.sliding_window_view(pad, k), axis=1)[: v.size]


def _track(start: np.ndarray, ref: np.ndarray, u_samples: np.ndarray,
           u_times: np.ndarray) -> np.ndarray:
    """Each mark's unit: a running median of 11 unit samples (sorted by time), s.

    Runs of marks with one reference unit are tracked on their own, so that a change of
    speed found by :func:`_local_reference` stays abrupt; a run without two samples of
    its own keeps its reference.
    """
    local = ref.astype(float).copy()
    cuts = np.flatnonzero(ref[1:] != ref[:-1]) + 1
    for lo, hi in zip(np.concatenate([[0], cuts]), np.concatenate([cuts, [start.size]]),
                      strict=True):
        # u_times are sorted: the run's samples are one slice of them
        i0 = int(np.searchsorted(u_times, start[lo]))
        i1 = int(np.searchsorted(u_times, start[hi])) if hi < start.size else u_times.size
        if i1 - i0 >= 2:
            track = _running_median(u_samples[i0:i1], 11)
            local[lo:hi] = np.interp(start[lo:hi], u_times[i0:i1], track)
    return local


def _confidence(distance: np.ndarray, spread: float) -> np.ndarray:
    from math import erf

    z = np.abs(distance) / max(spread, 1e-3)
    return np.array([0.5 * (1 + erf(float(x) / math.sqrt(2))) for x in np.atleast_1d(z)])


def _fit_unit(start: np.ndarray, end: np.ndarray, is_dash: np.ndarray,
              gap_class: np.ndarray, *, farnsworth: bool) -> float | None:
    """Least-squares unit from every edge inside words, s (module notes).

    From one mark to the next inside a word, start to start spans the first mark and
    the gap, and end to end the gap and the second mark; either interval is free of
    the keying weight and of the threshold's bias, which move both of its edges alike.
    With a dot of u, a dash of v (v = 3 u by the standard, but a fist may differ) and
    gaps of 1 or 3 units, each interval is ``a u + b v`` for known a and b, and u, v
    follow by least squares, with intervals more than 4 robust deviations off dropped.
    Character gaps join in unless Farnsworth spacing stretches them.
    """
    ok = (gap_class == ELEMENT) | ((gap_class == CHARACTER) & (not farnsworth))
    i = np.flatnonzero(ok)
    if i.size < 3:
        return None
    g = np.where(gap_class[i] == ELEMENT, 1.0, 3.0)
    dot0, dash0 = (~is_dash[i]).astype(float), is_dash[i].astype(float)
    dot1, dash1 = (~is_dash[i + 1]).astype(float), is_dash[i + 1].astype(float)
    a = np.concatenate([np.stack([dot0 + g, dash0], axis=1),
                        np.stack([g + dot1, dash1], axis=1)])
    y = np.concatenate([start[i + 1] - start[i], end[i + 1] - end[i]])
    keep = np.ones(y.size, dtype=bool)
    for _ in range(2):
        coef, *_ = np.linalg.lstsq(a[keep], y[keep], rcond=None)
        resid = y - a @ coef
        mad = float(np.median(np.abs(resid[keep]))) or 1e-12
        keep = np.abs(resid) <= 4 * 1.4826 * mad
    u = float(coef[0])
    return u if u > 0 else None


def refit_unit(symbols: Symbols) -> Symbols:
    """The same symbols with the unit fitted on every edge inside words (:func:`_fit_unit`).

    For a decision made elsewhere (the sequence decoder), so that its speed is measured
    the same way as the threshold path's. Unchanged when the fit has too few intervals.
    """
    if symbols.n_marks < 2:
        return symbols
    unit = _fit_unit(symbols.start_s, symbols.end_s, symbols.is_dash, symbols.gap_class,
                     farnsworth=symbols.farnsworth)
    if unit is None:
        return symbols
    f_wpm = symbols.farnsworth_wpm
    if symbols.farnsworth:
        gaps = symbols.start_s[1:] - symbols.end_s[:-1]
        char_gaps = gaps[symbols.gap_class == CHARACTER]
        if char_gaps.size:
            f_wpm = farnsworth_wpm(1.2 / unit, float(np.median(char_gaps)))
    return replace(symbols, dot_s=unit, farnsworth_wpm=f_wpm)


def classify(marks: Marks, *, wpm: float | None = None) -> Symbols:
    """Give every mark and space its class and measure the keying speed.

    Parameters
    ----------
    marks : Marks
    wpm : float, optional
        Speed the user says was sent; the unit search is then skipped and the unit is
        only refined around ``1.2 / wpm``.

    Returns
    -------
    Symbols
        With ``dot_s`` None when there is no mark at all.
    """
    start, end = marks.start_s, marks.end_s
    n = start.size
    m = end - start
    g = start[1:] - end[:-1]
    if n == 0:
        e = np.empty(0)
        return Symbols(start, end, np.zeros(0, bool), np.zeros(0, int), e, e, e, None, None,
                       False, None, marks.source)
    u0 = 1.2 / wpm if wpm else coarse_unit_s(m, g)
    assert u0 is not None
    ref = np.full(n, u0) if wpm else _local_reference(m, g, u0)
    # refine: the start-to-start time of a dot and the element gap after it is 2 units
    r_m, r_g = m / ref, g / ref[:-1]
    is_dot0 = r_m < 2.0
    pair = is_dot0[:-1] & (r_g < 2.0)
    step = start[1:] - start[:-1]
    u_samples, u_times = step[pair] / 2.0, start[:-1][pair]
    if u_samples.size < 5:
        # few dots: a dash and its gap span 4 units, for a fist with a 1:3 dash
        dash_pair = (~is_dot0[:-1]) & (r_g < 2.0)
        u_samples = np.concatenate([u_samples, step[dash_pair] / 4.0])
        u_times = np.concatenate([u_times, start[:-1][dash_pair]])
        u_ref = np.concatenate([ref[:-1][pair], ref[:-1][dash_pair]])
    else:
        u_ref = ref[:-1][pair]
    ok = (u_samples > 0.6 * u_ref) & (u_samples < 1.6 * u_ref)
    u_samples, u_times = u_samples[ok], u_times[ok]
    if u_samples.size >= 2:
        order = np.argsort(u_times)
        u_samples, u_times = u_samples[order], u_times[order]
        unit = float(np.median(u_samples))
        local = _track(start, ref, u_samples, u_times)
    else:
        unit = float(u0)
        local = np.full(n, unit)
    if wpm:
        # the user's speed stands unless the marks clearly disagree
        local = np.where(np.abs(np.log(local / u0)) < math.log(1.3), local, u0)
    # a mark far longer than any element is a key held down (to tune, or stuck): it is
    # set aside, so that it does not enter the timing; the space across it is a word
    # break
    held = m > HELD_MARK_UNITS * local
    held_start, held_end = start[held], end[held]
    if held.any():
        start, end, m, local = start[~held], end[~held], m[~held], local[~held]
        n = start.size
        g = start[1:] - end[:-1]
        if n == 0:
            e = np.empty(0)
            return Symbols(start, end, np.zeros(0, bool), np.zeros(0, int), e, e, e, None,
                           None, False, None, marks.source, held_start, held_end)
    # marks: dots and dashes. For the clusters' centres, marks count as at most a word
    # gap long: a longer one (a short key-down, noise bridging elements) is a dash, but
    # would otherwise split off from all the other marks as a cluster of its own. The
    # spread, and so the confidences, see the true lengths
    lm = np.log(m / local)
    lc = np.minimum(lm, math.log(LONG_MARK_UNITS))
    if n >= 2:
        c_lo, c_hi, _ = _two_means(lc)
    else:
        c_lo = c_hi = float(lc[0])
    if c_hi - c_lo > math.log(1.8):
        boundary = 0.5 * (c_lo + c_hi)
        is_dash = lm > boundary
        spread = math.sqrt(np.mean(np.concatenate([lm[~is_dash] - c_lo, lm[is_dash] - c_hi])
                                   ** 2)) if n > 2 else 0.1
        dash_ratio = float(np.exp(c_hi - c_lo))
    else:  # one class only: a dot is near 1 unit, a dash near 3
        boundary = math.log(math.sqrt(3.0))
        is_dash = lm > boundary
        spread = float(np.std(lm)) if n > 2 else 0.1
        dash_ratio = None
    spread = max(spread, 0.05)
    mark_conf = _confidence(lm - boundary, spread)
    # spaces
    gap_class = np.full(g.size, ELEMENT, dtype=int)
    gap_conf = np.ones(g.size)
    farns, f_wpm = False, None
    if g.size:
        local_g = 0.5 * (local[:-1] + local[1:])
        lg = np.log(g / local_g)
        elem = lg < math.log(2.0)
        # a pause is far longer than the usual gap between characters, which Farnsworth
        # spacing may stretch past 20 units
        pause_lg = math.log(PAUSE_UNITS)
        if (~elem).any():
            pause_lg = max(pause_lg, float(np.median(lg[~elem])) + math.log(4.0))
        pause = lg > pause_lg
        longer = ~elem & ~pause
        gap_class[~elem] = WORD
        if longer.sum() >= 2:
            c1, c2, _ = _two_means(lg[longer])
            if c2 - c1 > math.log(1.6):
                split = 0.5 * (c1 + c2)
                char_centre = c1
            else:
                centre = 0.5 * (c1 + c2)
                split = np.inf if (centre < math.log(5.0) or longer.sum() >= 3) else -np.inf
                char_centre = centre
            cls = np.where(lg[longer] > split, WORD, CHARACTER)
            gap_class[np.flatnonzero(longer)] = cls
            if math.isfinite(split):
                gap_conf[longer] = _confidence(lg[longer] - split, max(spread, 0.1))
            if char_centre > math.log(4.5) and (cls == CHARACTER).any():
                char_gap_s = float(np.median(g[longer][cls == CHARACTER]))
                f_wpm = farnsworth_wpm(1.2 / unit, char_gap_s)
                # stretched gaps make the overall speed slower than the characters'
                farns = f_wpm < 0.95 * (1.2 / unit)
                f_wpm = f_wpm if farns else None
        elif longer.sum() == 1:
            gap_class[longer] = CHARACTER if lg[longer][0] < math.log(5.0) else WORD
        gap_conf[elem | longer] = np.minimum(
            gap_conf[elem | longer], _confidence(lg[elem | longer] - math.log(2.0), spread))
    if not wpm:
        unit = _fit_unit(start, end, is_dash, gap_class, farnsworth=farns) or unit
    return Symbols(start_s=start, end_s=end, is_dash=is_dash, gap_class=gap_class,
                   mark_confidence=mark_conf, gap_confidence=gap_conf, local_dot_s=local,
                   dot_s=unit, dash_dot_ratio=dash_ratio, farnsworth=farns,
                   farnsworth_wpm=f_wpm, source=marks.source, held_start_s=held_start,
                   held_end_s=held_end)
