"""Stage 2: Envelope -> Marks. Noise floor, mark level, adaptive threshold, hysteresis.

Method
------
The envelope is cut into windows of ``window_s`` (half overlapping). In each window the
noise floor is measured from the low part of the magnitude distribution: after the
moving average, the magnitude of noise alone is Rayleigh distributed, so its p-quantile
is ``sigma * sqrt(-2 ln(1 - p))`` [1]_, and the 20 % quantile of a window whose spaces
fill at least half of it estimates ``sigma`` within a few per cent. The floor is then
smoothed by a running minimum-of-medians across neighbouring windows, because a window
full of key-down would otherwise read the mark as noise.

A window holds a mark level when enough of its samples stand clear of the noise
(above ``sigma * sqrt(2 ln(1/p_fa))``, a Rayleigh false-alarm rate of ``p_fa``); the
level is the median of those samples. Windows without one borrow the level of the
nearest windows that had one, so a fade is followed and a pause keeps the last level.

The threshold sits halfway between the mean noise magnitude ``sigma * sqrt(pi/2)`` and
the mark level, in magnitude (a linear ramp through the moving average crosses it at the
true edge, so marks keep their length), and never below the Rayleigh false-alarm level.
The decision has hysteresis of ``±hysteresis_db`` around it (a Schmitt trigger, common
practice). Levels are interpolated linearly between window centres.

References
----------
.. [1] J. G. Proakis and M. Salehi, "Digital Communications", 5th ed., McGraw-Hill,
   2008, section 2.3 (Rayleigh and Rice distributions).
.. [2] R. Lyons, "Digital envelope detection: The good, the bad, and the ugly",
   IEEE Signal Processing Magazine 34(4), 2017.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from .baseband import Envelope


@dataclass(frozen=True)
class Levels:
    """Noise floor, mark level and threshold as they moved, at window centres."""

    time_s: np.ndarray  # shape (k,), window centres, s
    noise: np.ndarray  # shape (k,), mean noise magnitude sigma*sqrt(pi/2), full scale
    mark: np.ndarray  # shape (k,), mark magnitude (nan where never seen), full scale
    threshold: np.ndarray  # shape (k,), full scale
    sigma: np.ndarray  # shape (k,), Rayleigh parameter of the noise


@dataclass(frozen=True)
class Marks:
    """Key-down intervals found in an envelope."""

    start_s: np.ndarray  # shape (n,), seconds from the start of the capture, sorted
    end_s: np.ndarray  # shape (n,), end_s > start_s
    level: np.ndarray  # shape (n,), mean envelope magnitude over each mark, full scale
    peak_snr_db: np.ndarray  # shape (n,), mark level over the local noise floor, dB
    levels: Levels
    source: str  # the file these came from ("<array>" for arrays), for messages

    @property
    def n_marks(self) -> int:
        return int(self.start_s.size)

    def durations_s(self) -> tuple[np.ndarray, np.ndarray]:
        """Mark lengths and the lengths of the spaces between them, s."""
        return self.end_s - self.start_s, self.start_s[1:] - self.end_s[:-1]


def _windows(x: np.ndarray, win: int, step: int) -> tuple[np.ndarray, np.ndarray]:
    """Half-overlapping windows of x, thinned to every step-th sample.

    Returns the window start indices and an array (n_windows, m) of their samples.
    Neighbouring samples of a moving average are nearly equal, so thinning to a few
    samples per filter length loses nothing and bounds the memory.
    """
    hop = max(1, win // 2)
    if x.size >= win:
        n_win = 1 + (x.size - win) // hop
        starts = np.minimum(np.arange(n_win) * hop, x.size - win)
        idx = starts[:, None] + np.arange(0, win, step)[None, :]
    else:
        starts = np.zeros(1, dtype=int)
        idx = np.arange(0, x.size, step)[None, :]
    return starts, x[idx]


def levels(envelope: Envelope, *, window_s: float, p_fa: float = 1e-3,
           noise_mask: np.ndarray | None = None) -> Levels:
    """Track noise floor and mark level through an envelope (see the module notes).

    Parameters
    ----------
    envelope : Envelope
    window_s : float
        Window length, s; about 25 dots holds marks and spaces both.
    p_fa : float
        Rayleigh exceedance probability that defines "clear of the noise".
    noise_mask : ndarray of bool, optional
        Samples known to hold noise alone (the interiors of spaces of an earlier
        decision). Each window's ``sigma`` is then ``sqrt(mean(x**2) / 2)`` over them,
        the maximum-likelihood Rayleigh estimate, instead of the quantile estimate.
    """
    x = envelope.magnitude
    rate = envelope.rate_hz
    win = max(8, int(round(window_s * rate)))
    step = max(1, int(envelope.filter_s * rate) // 4)
    starts, frames = _windows(x, win, step)
    frames = np.sort(frames, axis=1)
    m = frames.shape[1]
    centres = starts + min(win, x.size) / 2.0
    q20 = frames[:, int(0.2 * (m - 1))]
    if noise_mask is not None:
        _, mask_frames = _windows(noise_mask, win, step)
        _, raw_frames = _windows(x, win, step)
        count = mask_frames.sum(axis=1)
        power = np.where(mask_frames, raw_frames, 0.0) ** 2
        masked = np.full(starts.size, np.nan)
        ok = count >= 16
        masked[ok] = np.sqrt(power[ok].sum(axis=1) / count[ok] / 2.0)
    fraction_noise = np.ones(centres.size)
    rows = np.arange(starts.size)
    for _ in range(2):
        # the 20 % quantile of a window is the (0.2 / f) quantile of its noise when a
        # fraction f of it is key-up; f comes from the previous threshold
        p = np.clip(0.2 / fraction_noise, 0.2, 0.9)
        sigma_raw = q20 / np.sqrt(-2.0 * np.log(1.0 - p))
        # a window full of key-down reads its mark as noise: take, around each window,
        # the smallest of the medians of three-window runs, over about seven windows
        sigma = _min_of_medians(sigma_raw)
        if noise_mask is not None and ok.any():
            sigma = _fill_nearest(masked)
        if envelope.noise_sigma is not None:
            # each estimate errs high in its own way (missed marks in the spaces; strong
            # sidebands in the noise band), so the smaller one is kept; but not below
            # half the other, since a receiver's narrow filter may have taken the noise
            # band's noise away
            measured = envelope.noise_sigma[np.minimum(starts + win // 2, x.size - 1)]
            sigma = np.where(measured > 0, np.clip(measured, 0.5 * sigma, sigma), sigma)
        clear = sigma * math.sqrt(2.0 * math.log(1.0 / p_fa))
        # frames are sorted: the samples above `clear` are the last n_above of each row
        n_above = m - np.array([np.searchsorted(frames[i], clear[i], side="right")
                                for i in rows])
        min_count = max(3, int(0.03 * m))
        # the upper quartile of those: the plateau of dashes, not the filter's flanks
        pick = np.clip(m - n_above + (0.75 * (n_above - 1)).astype(int), 0, m - 1)
        mark = np.where(n_above >= min_count, frames[rows, pick], np.nan)
        mark_filled = _fill_nearest(mark)
        noise = sigma * math.sqrt(math.pi / 2.0)
        if np.isnan(mark_filled).all():
            threshold = clear * 1.5
            break
        threshold = np.maximum(noise + 0.5 * (mark_filled - noise), clear)
        below = np.array([np.searchsorted(frames[i], threshold[i]) for i in rows])
        fraction_noise = np.maximum(below / m, 0.2)
    t_s = envelope.start_s + centres / rate
    return Levels(time_s=t_s, noise=noise, mark=mark_filled, threshold=threshold, sigma=sigma)


def _min_of_medians(v: np.ndarray) -> np.ndarray:
    if v.size < 3:
        return np.full(v.size, np.min(v)) if v.size else v
    pad = np.pad(v, 1, mode="edge")
    med3 = np.median(np.lib.stride_tricks.sliding_window_view(pad, 3), axis=1)
    pad = np.pad(med3, 3, mode="edge")
    return np.min(np.lib.stride_tricks.sliding_window_view(pad, 7), axis=1)


def _fill_nearest(v: np.ndarray) -> np.ndarray:
    ok = np.flatnonzero(~np.isnan(v))
    if ok.size == 0:
        return v.copy()
    idx = np.arange(v.size)
    return np.interp(idx, ok, v[ok])


def find(envelope: Envelope, *, window_s: float = 2.0, hysteresis_db: float = 0.5,
         min_mark_s: float = 0.0, min_space_s: float = 0.0, p_fa: float = 1e-3,
         levels_: Levels | None = None) -> Marks:
    """Decide key-down and key-up with an adaptive threshold and hysteresis.

    Parameters
    ----------
    envelope : Envelope
    window_s : float
        Level-tracking window, s.
    hysteresis_db : float
        The decision turns on above ``threshold * 10**(h/20)`` and off below
        ``threshold / 10**(h/20)``, dB.
    min_mark_s, min_space_s : float
        Glitch suppression, s: spaces shorter than ``min_space_s`` are bridged first,
        then marks shorter than ``min_mark_s`` are dropped (give both relative to the
        dot length once it is known).
    p_fa : float
        Rayleigh exceedance probability for the lowest threshold.
    levels_ : Levels, optional
        Levels already tracked on this envelope.

    Returns
    -------
    Marks
        Edges are placed where the magnitude crosses the threshold, by linear
        interpolation between samples.
    """
    if levels_ is None:
        lv = levels(envelope, window_s=window_s, p_fa=p_fa)
        first = _decide(envelope, lv, hysteresis_db)
        if first is not None and first[0].size:
            # measure the noise again where the first decision saw space, away from
            # the marks by half the filter, so no mark's flank is taken for noise
            guard_s = 0.5 * envelope.filter_s + 2.0 / envelope.rate_hz
            gap_start = np.concatenate([[-np.inf], first[1]])
            gap_end = np.concatenate([first[0], [np.inf]])
            mask = inside(envelope.time_s, gap_start + guard_s, gap_end - guard_s)
            lv = levels(envelope, window_s=window_s, p_fa=p_fa, noise_mask=mask)
    else:
        lv = levels_
    decided = _decide(envelope, lv, hysteresis_db)
    empty = np.empty(0)
    if decided is None:
        return Marks(empty, empty, empty, empty, lv, envelope.source)
    if levels_ is None:
        tracked = _mark_levels(envelope, lv, *decided)
        if tracked is not None:
            # the marks found tell the level where they stand; in a long pause the window
            # levels may sag towards the noise (a window of noise alone can pass its own
            # test for marks), so the threshold is kept at least half of the one the marks
            # imply there. Half, not all: the marks' levels are smoothed over several
            # marks and lag behind a fade, which the windows follow
            from_marks = np.interp(lv.time_s, tracked.time_s, tracked.threshold)
            lv = replace(lv, threshold=np.maximum(lv.threshold, 0.5 * from_marks))
            decided = _decide(envelope, lv, hysteresis_db) or decided
    start_s, end_s = _suppress(*decided, min_mark_s=min_mark_s, min_space_s=min_space_s)
    lvl, snr = _mark_stats(envelope.magnitude, envelope.time_s, start_s, end_s, lv,
                           envelope.rate_hz)
    return Marks(start_s=start_s, end_s=end_s, level=lvl, peak_snr_db=snr, levels=lv,
                 source=envelope.source)


def _mark_levels(envelope: Envelope, lv: Levels, start_s: np.ndarray,
                 end_s: np.ndarray) -> Levels | None:
    """Levels re-estimated from the marks of a decision, at their centres.

    A mark's level is the mean magnitude over the middle half of it, taken only from
    marks of 1.5 filter lengths or more: after the moving average those have a
    plateau at the carrier's level there, while a shorter mark's top is a peak that
    reaches the level only at one point. Marks not clear of the noise are left out,
    and a running median over five marks smooths the levels. The noise floor stays as
    tracked by windows. Returns None with fewer than five usable marks.
    """
    x, t = envelope.magnitude, envelope.time_s
    length = end_s - start_s
    use = length >= 1.5 * envelope.filter_s
    lo = np.searchsorted(t, start_s + 0.25 * length)
    hi = np.searchsorted(t, end_s - 0.25 * length)
    use &= hi > lo
    if use.sum() < 5:
        return None
    lo, hi = lo[use], hi[use]
    c = np.concatenate([[0.0], np.cumsum(x)])
    centre_s = 0.5 * (start_s + end_s)[use]
    level = (c[hi] - c[lo]) / (hi - lo)
    sigma = np.interp(centre_s, lv.time_s, lv.sigma)
    clear = sigma * math.sqrt(2.0 * math.log(1e3))
    keep = level > clear
    if keep.sum() < 5:
        return None
    centre_s, level, sigma, clear = centre_s[keep], level[keep], sigma[keep], clear[keep]
    pad = np.pad(level, 2, mode="edge")
    level = np.median(np.lib.stride_tricks.sliding_window_view(pad, 5), axis=1)
    noise = sigma * math.sqrt(math.pi / 2.0)
    threshold = np.maximum(noise + 0.5 * (level - noise), clear)
    return Levels(time_s=centre_s, noise=noise, mark=level, threshold=threshold, sigma=sigma)


def inside(t: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Samples of t inside any [lo, hi] (sorted, disjoint intervals)."""
    i0 = np.searchsorted(t, lo)
    i1 = np.searchsorted(t, hi)
    delta = np.zeros(t.size + 1, dtype=np.int64)
    ok = i1 > i0
    np.add.at(delta, i0[ok], 1)
    np.add.at(delta, i1[ok], -1)
    return np.cumsum(delta[:-1]) > 0


def _decide(envelope: Envelope, lv: Levels, hysteresis_db: float):
    """Schmitt-trigger decision; mark (start_s, end_s) arrays, or None."""
    x = envelope.magnitude
    if x.size < 2 or np.isnan(lv.mark).all():
        return None
    t = envelope.time_s
    thr = np.interp(t, lv.time_s, lv.threshold)
    h = 10 ** (hysteresis_db / 20.0)
    state = np.full(x.size, -1, dtype=np.int8)
    state[x > thr * h] = 1
    state[x < thr / h] = 0
    known = np.flatnonzero(state >= 0)
    if known.size == 0:
        return None
    # hold the last decided state through the hysteresis band
    fill = np.maximum.accumulate(np.where(state >= 0, np.arange(x.size), 0))
    on = state[fill] == 1
    on[: known[0]] = state[known[0]] == 1
    edges = np.flatnonzero(np.diff(on.astype(np.int8)))
    rises = edges[on[edges + 1]]
    falls = edges[~on[edges + 1]]
    if on[0]:
        rises = np.concatenate([[-1], rises])
    if on[-1]:
        falls = np.concatenate([falls, [x.size - 1]])
    return (_crossing_s(x, thr, rises, t, envelope.rate_hz),
            _crossing_s(x, thr, falls, t, envelope.rate_hz))


def _crossing_s(x, thr, idx, t, rate):
    """Time where x crosses thr between samples idx and idx + 1."""
    out = np.empty(idx.size)
    inner = (idx >= 0) & (idx < x.size - 1)
    i = idx[inner]
    a, b = x[i] - thr[i], x[i + 1] - thr[i + 1]
    frac = np.clip(np.where(a != b, a / (a - b), 0.5), 0.0, 1.0)
    out[inner] = t[i] + frac / rate
    out[idx < 0] = t[0]
    out[idx >= x.size - 1] = t[-1]
    return out


def _suppress(start_s, end_s, *, min_mark_s, min_space_s):
    if start_s.size and min_space_s > 0:
        gaps = start_s[1:] - end_s[:-1]
        keep = np.concatenate([[True], gaps >= min_space_s])
        # a bridged space joins a mark to the one before it
        start_s = start_s[keep]
        end_s = np.maximum.reduceat(end_s, np.flatnonzero(keep)) if end_s.size else end_s
    if start_s.size and min_mark_s > 0:
        keep = (end_s - start_s) >= min_mark_s
        start_s, end_s = start_s[keep], end_s[keep]
    return start_s, end_s


def _mark_stats(x, t, start_s, end_s, lv, rate):
    if start_s.size == 0:
        return np.empty(0), np.empty(0)
    i0 = np.clip(np.searchsorted(t, start_s), 0, x.size - 1)
    i1 = np.clip(np.searchsorted(t, end_s), 0, x.size)
    i1 = np.maximum(i1, i0 + 1)
    c = np.concatenate([[0.0], np.cumsum(x)])
    level = (c[i1] - c[i0]) / (i1 - i0)
    noise = np.interp((start_s + end_s) / 2, lv.time_s, lv.noise)
    snr_db = 20 * np.log10(np.maximum(level, 1e-30) / np.maximum(noise, 1e-30))
    return level, snr_db
