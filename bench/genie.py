"""A genie receiver: the reference that okdecode's sensitivity is measured against.

It knows what no receiver knows: the exact carrier frequency and the exact timing of the
keying (the true element boundaries of a synthetic recording). It cuts every true mark and
gap into dot-length slots, integrates each slot noncoherently, ``|sum of x(t) e^{-j w t}|``
over the slot, and decides on or off with one fixed threshold. Its slot error rate is then
the textbook one for on-off keying with noncoherent detection (J. G. Proakis and
M. Salehi, "Digital Communications", 5th ed., McGraw-Hill, 2008, section 4.5): with the
slot statistic normalised by the noise's standard deviation per component,

    P(on | off) = exp(-b^2 / 2),   P(off | on) = 1 - Q1(a, b),   a = sqrt(2 Es / N0),

``b`` the threshold and ``Q1`` Marcum's Q function, so for equiprobable slots
``Pe = 0.5 [exp(-b^2 / 2) + 1 - Q1(a, b)]``.

Runs of on-slots and off-slots are then read as marks and gaps (a run of 1 slot is a dot,
2 or more a dash; 1 off-slot an element gap, 2 to 4 a character gap, 5 or more a word
gap) and the patterns through the ITU-R M.1677-1 table.

This module is a benchmark tool: it uses okdecode only for the table and the generator's
truth, never the receiver.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from okdecode.text import PATTERNS, PLACEHOLDER


@dataclass(frozen=True)
class Slots:
    """The genie's slots of one recording."""

    start_s: np.ndarray  # shape (n,), s
    end_s: np.ndarray  # shape (n,), s
    on: np.ndarray  # shape (n,), bool: the key was down (the truth)
    stat: np.ndarray  # shape (n,), |slot sum| / noise standard deviation per component


def slot_grid(start_s: np.ndarray, end_s: np.ndarray, *, dot_s: float
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Slots of the true keying: every mark and gap cut into dot-length pieces.

    Parameters
    ----------
    start_s, end_s : ndarray, shape (m,)
        True leading and trailing edges of the marks, s.
    dot_s : float
        The dot length, s.

    Returns
    -------
    (ndarray, ndarray, ndarray)
        Slot starts and ends, s, and whether each slot is key-down. An element of
        length ``T`` gets ``max(1, round(T / dot_s))`` equal slots.
    """
    edges = np.empty(2 * start_s.size)
    edges[0::2], edges[1::2] = start_s, end_s
    lo, hi, on = [], [], []
    for i in range(edges.size - 1):
        length = edges[i + 1] - edges[i]
        n = max(1, int(round(length / dot_s)))
        cuts = edges[i] + length * np.arange(n + 1) / n
        lo.append(cuts[:-1])
        hi.append(cuts[1:])
        on.append(np.full(n, i % 2 == 0))
    return np.concatenate(lo), np.concatenate(hi), np.concatenate(on)


def slot_statistics(samples: np.ndarray, rate_hz: float, *, carrier_hz: float,
                    noise_rms: float, start_s: np.ndarray, end_s: np.ndarray) -> np.ndarray:
    """Noncoherent slot statistics ``|sum x e^{-j w t}| / sqrt(n s^2 / 2)``.

    For real audio with noise of variance ``s^2`` per sample, the mixed noise summed over
    ``n`` samples has variance ``n s^2 / 2`` per component, and a carrier of amplitude
    ``A`` gives ``n A / 2``; the normalised statistic is then Rician with
    ``a^2 = n A^2 / (2 s^2) = 2 Es / N0`` (C/N0 as the generator defines it, Es = C T).
    For complex samples with ``E|n|^2 = s^2`` the same normalisation holds with ``A``.
    """
    t = np.arange(samples.size) / rate_hz
    mixed = samples * np.exp(-2j * np.pi * carrier_hz * t)
    c = np.concatenate([[0.0], np.cumsum(mixed)])
    i0 = np.clip(np.round(start_s * rate_hz).astype(np.int64), 0, samples.size)
    i1 = np.clip(np.round(end_s * rate_hz).astype(np.int64), 0, samples.size)
    n = np.maximum(i1 - i0, 1)
    return np.abs(c[i1] - c[i0]) / np.sqrt(n * noise_rms**2 / 2.0)


def measure(recording, *, dot_s: float | None = None) -> Slots:
    """The genie's slots of a synthetic recording (okdecode.synth.Recording)."""
    truth = recording.truth
    keying = truth.keying
    dot = keying.dot_s if dot_s is None else dot_s
    lo, hi, on = slot_grid(keying.start_s, keying.end_s, dot_s=dot)
    stat = slot_statistics(recording.samples, recording.rate_hz,
                           carrier_hz=truth.scenario.carrier_hz, noise_rms=truth.noise_rms,
                           start_s=lo, end_s=hi)
    return Slots(start_s=lo, end_s=hi, on=on, stat=stat)


def marcum_q1(a: float, b: np.ndarray) -> np.ndarray:
    """Marcum's Q function of order 1: ``P(R > b)`` for R Rician with parameter ``a``.

    ``R^2`` is noncentral chi-square with 2 degrees of freedom and noncentrality ``a^2``.
    """
    from scipy import stats

    return stats.ncx2.sf(np.asarray(b, dtype=float) ** 2, 2, a * a)


def ook_error_probability(a: float, b: np.ndarray) -> np.ndarray:
    """Slot error probability of noncoherent OOK, equiprobable slots (Proakis)."""
    b = np.asarray(b, dtype=float)
    return 0.5 * (np.exp(-b * b / 2.0) + 1.0 - marcum_q1(a, b))


def best_threshold(a: float) -> float:
    """The threshold ``b`` that minimises :func:`ook_error_probability` for ``a``."""
    from scipy import optimize

    res = optimize.minimize_scalar(lambda b: float(ook_error_probability(a, b)),
                                   bounds=(0.0, a + 5.0), method="bounded")
    return float(res.x)


def best_fixed_threshold(slots: list[Slots]) -> float:
    """The one threshold with the fewest slot errors over several recordings."""
    stat = np.concatenate([s.stat for s in slots])
    on = np.concatenate([s.on for s in slots])
    order = np.argsort(stat)
    x, truth = stat[order], on[order]
    # deciding "on" above x[i]: the off-slots above it and the on-slots at or below it err
    off_above = np.concatenate([[np.count_nonzero(~truth)], np.count_nonzero(~truth)
                                - np.cumsum(~truth)])
    on_below = np.concatenate([[0], np.cumsum(truth)])
    errors = off_above + on_below
    i = int(np.argmin(errors))
    if i == 0:
        return float(x[0]) - 1e-9
    if i >= x.size:
        return float(x[-1]) + 1e-9
    return 0.5 * float(x[i - 1] + x[i])


def text(slots: Slots, threshold: float) -> str:
    """The message the genie reads with a fixed threshold."""
    on = slots.stat > threshold
    if not on.any():
        return ""
    first, last = np.flatnonzero(on)[[0, -1]]
    on = on[first : last + 1]
    change = np.flatnonzero(np.diff(on.astype(np.int8))) + 1
    bounds = np.concatenate([[0], change, [on.size]])
    out: list[str] = []
    pattern = ""
    for i in range(bounds.size - 1):
        n = int(bounds[i + 1] - bounds[i])
        if on[bounds[i]]:
            pattern += "." if n == 1 else "-"
            continue
        if n == 1:
            continue
        out.append(PATTERNS.get(pattern, PLACEHOLDER))
        pattern = ""
        if n >= 5:
            out.append(" ")
    out.append(PATTERNS.get(pattern, PLACEHOLDER))
    return "".join(out)


def slot_error_rate(slots: Slots, threshold: float) -> tuple[float, float]:
    """Measured ``P(on | off)`` and ``P(off | on)`` at a threshold."""
    decided = slots.stat > threshold
    off, on = ~slots.on, slots.on
    return (float(np.mean(decided[off])) if off.any() else math.nan,
            float(np.mean(~decided[on])) if on.any() else math.nan)
