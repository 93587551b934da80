"""Known-message detection: is the expected keying there, even too weak to decode?

When the sent text is known, its keying is a known pattern of marks and spaces, and the
question "is it in the recording" is a detection problem with a matched template, which
integrates the energy of the whole message instead of deciding every element alone.

Method
------
The complex baseband ``z`` (about 1 kHz, :func:`okdecode.baseband.tune`) is cut, for a
trial character speed, into *cells* one dot long. Each cell's energy is the sum of the
squared magnitudes of the coherent sums of ``m`` disjoint sub-windows of at most
``coherent_s`` (so that a residual carrier offset of a few Hz costs little),

.. math:: E = \\sum_{i=1}^{m} \\Big| \\sum_{n \\in w_i} z[n] \\Big|^2 .

The expected text gives (:func:`okdecode.text.runs`) the cells that are key-down (a dot
is one cell, a dash three) and the cells of its spaces (1, 3 and 7 units; with Farnsworth
spacing the 3- and 7-unit gaps are stretched by a factor ``r``, J. Bloom, QEX 1990). For a
trial speed, stretch and start time the statistic is the ratio of the mean mark-cell
energy to the mean space-cell energy,

.. math:: F = \\frac{\\bar E_{mark}}{\\bar E_{space}} .

**Under noise alone** (white circular Gaussian noise, whatever its level), each cell's
energy over its noise power is a sum of ``m`` unit exponentials, i.e. ``chi^2_{2m} / 2``
[1]_, disjoint cells are independent, and ``F`` follows Fisher's F distribution with
``2 m n_mark`` and ``2 m n_space`` degrees of freedom: the single-test false-alarm
probability ``p = P(F_{d1,d2} > F)`` is exact and needs no noise estimate. The search
takes the largest ``F`` over start times (2 per dot, then 6 on the fine grid), speeds
(5 to 50 WPM on a geometric grid) and Farnsworth stretches, first on a coarse grid by
FFT correlation over every start, then on a fine grid around the best coarse fits. The
false-alarm probability of the search is the Sidak correction ``1 - (1 - p)^N`` [3]_ with
an effective number of tests ``N``, counted on the coarse grid: the statistic
decorrelates when the template moves by about one sub-window, so start times count one
per sub-window, and each coarse speed step (which moves the template's ends by ``4 e``
dots) counts ``4 e m`` tests and each stretch step ``2 e`` (speed and stretch move the
ends alike, so the second adds less). These factors are a heuristic of this module,
checked against noise-only trials (``tests/test_detect.py``, ``bench/bench_detection.py``).
When the carrier itself had to be guessed, ``N`` is multiplied by the number of carrier
hypotheses tried (Bonferroni).

**A different message** is a keyed signal too, so ``F`` of a wrong template can be large
when that signal is strong (a wrong template still finds alignments where somewhat more
of the other signal's marks fall on its marks than on its spaces). The best fit must
therefore also pass a *pattern check*: the interior cells of its 3- and 7-unit gaps (those
that touch no mark, so that a misalignment under a dot spills nothing into them) may hold
at most ``max_leak`` of the mark cells' excess energy over the noise floor (the floor
from the lower quartile of all cells, divided by the quartile of ``chi^2_{2m}/2``). A
wrong message puts about as much of its energy there as in the template's marks (a
share of 0.5 to 0.9 in trials); the right one, close to none. The check can only turn
detections down, so the false-alarm bound above still holds for noise; for other
messages the rate is measured (``tests/test_detect.py``).

**C/N0** is measured at the best fit as the decoder measures it
(:func:`okdecode.report.measure`): the template's key-down runs taken as marks, the
power inside them and inside the spaces, away from every edge. The matched energy gives
it too (a mark cell of ``m`` sub-windows of ``v`` samples holds ``m (v^2 |a|^2 + v
sigma^2)`` and a space cell ``m v sigma^2``, so ``C/N0 = (F - 1) / T_v`` with ``T_v`` the
sub-window length in seconds), but that is biased low by the misalignment the grids
leave and by the keying edges (2.5 dB at 30 dB-Hz) and saturates above about 35 dB-Hz;
it stands only where the interiors give nothing. Hand-sent code strays from the
template and reads low either way.

References
----------
.. [1] J. G. Proakis and M. Salehi, "Digital Communications", 5th ed., McGraw-Hill,
   2008, sections 2.3 and 4.5 (chi-square statistics of square-law detection).
.. [2] S. M. Kay, "Fundamentals of Statistical Signal Processing, Volume II: Detection
   Theory", Prentice Hall, 1998, chapter 7 (matched filters, unknown parameters).
.. [3] Z. Sidak, "Rectangular confidence regions for the means of multivariate normal
   distributions", J. Amer. Statist. Assoc. 62, 1967.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from . import baseband as bb
from .capture import Capture
from .errors import ParameterError
from .text import runs

#: Longest sub-window summed coherently, s: a carrier 5 Hz off loses 0.3 dB over it.
COHERENT_S = 0.03
#: Largest misalignment, in dots, that the coarse speed and stretch grids leave at the
#: ends of the template (the middle aligned): the grid steps are 4 * units / length. The
#: coarse grid's points are about independent under noise and count as tests.
COARSE_UNITS = 1.0
#: The same for the fine grid searched around the best coarse fits.
FINE_UNITS = 0.25
#: Start times per dot on the coarse and the fine grid.
COARSE_PER_UNIT, FINE_PER_UNIT = 2, 6
#: Coarse fits searched again on the fine grid.
N_REFINE = 4
#: Largest template bank correlated at once, complex elements (64 MiB).
BANK_ELEMENTS = 1 << 22
#: Effective tests per coarse grid step, per dot of end misalignment (times the
#: sub-windows per dot for speed), from the correlation of the statistic between grid
#: points and checked by noise-only trials (bench/bench_detection.py).
SPEED_TESTS, STRETCH_TESTS = 4.0, 2.0
#: Default false-alarm probability of a detection (the issue's 1 %).
ALPHA = 0.01
#: Largest share of the mark cells' excess energy that the space cells may hold.
MAX_LEAK = 0.35


@dataclass(frozen=True)
class Detection:
    """The result of a known-message search."""

    detected: bool
    statistic: float | None  # F of the best fit: mean mark-cell / mean space-cell energy
    false_alarm_probability: float | None  # of the whole search, at that statistic
    wpm: float | None  # character speed of the best fit, WPM (PARIS)
    farnsworth_wpm: float | None  # overall speed when the gaps are stretched, else None
    stretch: float | None  # factor on the 3- and 7-unit gaps (1: standard spacing)
    start_s: float | None  # leading edge of the first mark of the best fit, s
    end_s: float | None  # trailing edge of its last mark, s
    cn0_dbhz: float | None  # in the fitted template's interiors; None when not measurable
    carrier_hz: float | None  # the carrier searched (the best one when several)
    single_p: float | None  # false-alarm probability of the best fit alone
    n_tests: float  # effective number of tests of the search
    leak: float | None  # interior space cells' share of the mark cells' excess energy
    pattern_ok: bool  # leak <= max_leak
    alpha: float  # detected when false_alarm_probability <= alpha and pattern_ok

    def to_dict(self) -> dict:
        """The ``detection`` object of ``okdecode verify --json``."""

        def rnd(v, nd):
            return None if v is None or not math.isfinite(v) else round(float(v), nd)

        fa = self.false_alarm_probability
        return {
            "detected": self.detected,
            "statistic": rnd(self.statistic, 4),
            "false_alarm_probability": None if fa is None else float(f"{fa:.3g}"),
            "wpm": rnd(self.wpm, 2),
            "farnsworth_wpm": rnd(self.farnsworth_wpm, 2),
            "stretch": rnd(self.stretch, 3),
            "start_s": rnd(self.start_s, 4),
            "end_s": rnd(self.end_s, 4),
            "cn0_dbhz": rnd(self.cn0_dbhz, 2),
            "carrier_hz": rnd(self.carrier_hz, 2),
            "n_tests": rnd(self.n_tests, 1),
            "leak": rnd(self.leak, 3),
            "pattern_ok": self.pattern_ok,
        }


def nothing(*, alpha: float = ALPHA, carrier_hz: float | None = None) -> Detection:
    """A Detection for a recording that could not hold the message at all."""
    return Detection(detected=False, statistic=None, false_alarm_probability=None, wpm=None,
                     farnsworth_wpm=None, stretch=None, start_s=None, end_s=None,
                     cn0_dbhz=None, carrier_hz=carrier_hz, single_p=None, n_tests=0.0,
                     leak=None, pattern_ok=False, alpha=alpha)


# ---------------------------------------------------------------------------------------
# The template


@dataclass(frozen=True)
class Layout:
    """The runs of a message in dot units, split into what stretches and what does not."""

    key_down: np.ndarray  # shape (n_runs,), bool
    units: np.ndarray  # shape (n_runs,), int: 1 or 3 for marks, 1, 3 or 7 for spaces
    stretchable: np.ndarray  # shape (n_runs,), bool: the 3- and 7-unit gaps

    @property
    def fixed_units(self) -> float:
        return float(self.units[~self.stretchable].sum())

    @property
    def gap_units(self) -> float:
        return float(self.units[self.stretchable].sum())

    def length_units(self, stretch: float) -> float:
        return self.fixed_units + stretch * self.gap_units


def layout(expected: str, *, source: str = "<text>") -> Layout:
    """The runs of the expected text (ParameterError for a character without a signal)."""
    rs = runs(expected, source=source)
    if not rs:
        raise ParameterError(source, "the expected text is empty", expected="a message")
    down = np.array([r.key_down for r in rs])
    units = np.array([r.units for r in rs])
    return Layout(key_down=down, units=units, stretchable=(~down) & (units >= 3))


def cells(lay: Layout, stretch: float | np.ndarray, samples_per_unit: int
          ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Grid positions of the mark cells and the space cells of templates.

    A mark of u units holds u cells; a space of u units holds u cells too, spread evenly
    over it when it is stretched, so that every stretch has the same number of cells.

    Parameters
    ----------
    lay : Layout
    stretch : float or ndarray, shape (k,)
        Factor on the 3- and 7-unit gaps, >= 1.
    samples_per_unit : int
        Grid points per dot.

    Returns
    -------
    mark_pos, space_pos : ndarray of int, shape (n_mark,) or (k, n_mark), (k, n_space)
        Start of each cell on the grid.
    last : int or ndarray of int, shape (k,)
        Position of the end of the last mark.
    """
    r = np.atleast_1d(np.asarray(stretch, dtype=float))[:, None]
    p = samples_per_unit
    fixed = np.where(lay.stretchable, 0, lay.units).astype(float)
    gaps = np.where(lay.stretchable, lay.units, 0).astype(float)
    start = (np.concatenate([[0.0], np.cumsum(fixed)[:-1]])[None, :]
             + r * np.concatenate([[0.0], np.cumsum(gaps)[:-1]])[None, :])
    length = fixed[None, :] + r * gaps[None, :]
    run_of = np.repeat(np.arange(lay.units.size), lay.units)
    k = np.arange(run_of.size) - np.repeat(np.cumsum(lay.units) - lay.units, lay.units)
    spacing = length[:, run_of] / lay.units[run_of]  # 1 dot, or the stretched share
    pos = np.rint(p * (start[:, run_of] + k * spacing)).astype(int)
    is_mark = lay.key_down[run_of]
    last = np.rint(p * (start[:, -1] + length[:, -1])).astype(int)
    if np.ndim(stretch) == 0:
        return pos[0, is_mark], pos[0, ~is_mark], int(last[0])
    return pos[:, is_mark], pos[:, ~is_mark], last


def interior_spaces(lay: Layout) -> np.ndarray:
    """Which space cells (in the order of :func:`cells`) touch no mark.

    The first and last cell of every gap, and the one cell of an element gap, border a
    mark: a misalignment of up to a dot spills mark energy into them, but not into the
    others.
    """
    units = lay.units[~lay.key_down]
    return np.concatenate([np.arange(u) % max(u - 1, 1) != 0 if u >= 3 else np.zeros(u, bool)
                           for u in units]) if units.size else np.zeros(0, bool)


# ---------------------------------------------------------------------------------------
# Cell energies


class CellEnergies:
    """Cell energies of one baseband for any dot length, cached per sub-window length."""

    def __init__(self, baseband: bb.Baseband, *, coherent_s: float = COHERENT_S):
        self.rate_hz = baseband.rate_hz
        self.start_s = baseband.start_s
        self.coherent_s = coherent_s
        z = baseband.samples.astype(np.complex128)
        self._csum = np.concatenate([[0.0], np.cumsum(z)])
        self.n = z.size
        self._power: dict[int, np.ndarray] = {}

    def sub_power(self, v: int) -> np.ndarray:
        """``|sum of z over v samples from n|^2`` for each start n, shape (n - v + 1,)."""
        if v not in self._power:
            s = self._csum[v:] - self._csum[:-v]
            self._power[v] = s.real**2 + s.imag**2
        return self._power[v]

    def plan(self, dot_s: float) -> tuple[int, int]:
        """Sub-windows per cell m and their length v in samples, for a dot length."""
        m = max(1, int(round(dot_s / self.coherent_s)))
        v = max(1, int(math.floor(dot_s * self.rate_hz / m)))
        return m, v

    def grid(self, dot_s: float, samples_per_unit: int) -> tuple[np.ndarray, float, int, int]:
        """Energies of cells starting on a grid of ``samples_per_unit`` points per dot.

        Returns
        -------
        energy : ndarray, shape (k,)
            Energy of the cell starting at grid point j (time ``start_s + j * step_s``).
        step_s : float
            Grid step, s.
        m, v : int
            Sub-windows per cell and samples per sub-window.
        """
        m, v = self.plan(dot_s)
        r = self.sub_power(v)
        step = dot_s * self.rate_hz / samples_per_unit
        span = (m - 1) * dot_s * self.rate_hz / m + v  # samples one cell covers
        n_grid = int(math.floor((self.n - span) / step)) + 1
        if n_grid <= 0:
            return np.empty(0), step / self.rate_hz, m, v
        base = np.rint(np.arange(n_grid) * step).astype(int)
        energy = np.zeros(n_grid)
        for i in range(m):
            idx = base + int(round(i * dot_s * self.rate_hz / m))
            energy += r[np.minimum(idx, r.size - 1)]
        return energy, step / self.rate_hz, m, v


# ---------------------------------------------------------------------------------------
# The search


def speed_grid(lay: Layout, wpm_range: tuple[float, float], grid_units: float) -> np.ndarray:
    """Trial character speeds, WPM, fastest first, on a geometric grid.

    The relative step ``4 e / L`` (``L`` the template length in dots, ``e`` =
    ``grid_units``) leaves at most ``e`` dots of misalignment at either end when the
    middle is aligned.
    """
    lo, hi = wpm_range
    step = 4.0 * grid_units / max(lay.length_units(1.0), 1.0)
    n = int(math.floor(math.log(hi / lo) / math.log1p(step) + 1e-9)) + 1
    return hi / (1.0 + step) ** np.arange(n)


def sidak(p: float, n_tests: float) -> float:
    """``1 - (1 - p)^n``, accurate for small p."""
    if p <= 0.0:
        return 0.0
    return float(-math.expm1(n_tests * math.log1p(-min(p, 1.0 - 1e-16))))


@dataclass(frozen=True)
class _Fit:
    logp: float  # log of the single-test false-alarm probability
    ratio: float  # F
    wpm: float
    stretch: float
    start_s: float  # time of the template's first cell
    n_mark: int
    n_space: int
    m: int
    v: int


def _check(source: str, lay: Layout, wpm_range, max_stretch, alpha) -> tuple[float, float]:
    try:
        lo, hi = (float(w) for w in wpm_range)
    except (TypeError, ValueError):
        lo = hi = math.nan
    if not (math.isfinite(lo) and math.isfinite(hi) and 0 < lo <= hi):
        raise ParameterError(source, f"speed range {wpm_range!r}", expected="0 < low <= high")
    if not (math.isfinite(max_stretch) and max_stretch >= 1.0):
        raise ParameterError(source, f"stretch {max_stretch!r}", expected="at least 1")
    if not 0 < alpha < 1:
        raise ParameterError(source, f"alpha {alpha!r}", expected="0 < alpha < 1")
    return lo, hi


def _stretches(lay: Layout, dot_s: float, duration_s: float, max_stretch: float,
               grid_units: float) -> np.ndarray:
    """Trial stretches at one speed: linear steps of ``4 e / G`` (G the stretchable gaps)."""
    if lay.gap_units == 0:
        return np.ones(1)
    top = min(max_stretch, (duration_s / dot_s - lay.fixed_units) / lay.gap_units)
    step = 4.0 * grid_units / lay.gap_units
    return 1.0 + step * np.arange(int(math.floor((top - 1.0) / step + 1e-9)) + 1)


def _coarse(energies: CellEnergies, lay: Layout, speeds: np.ndarray, *, max_stretch: float,
            p: int, grid_units: float, keep: int) -> tuple[list[_Fit], float]:
    """Every speed, stretch and start on a coarse grid, by FFT correlation.

    Returns the ``keep`` best fits (a few per speed at most) and the effective number of
    tests of the grid (module notes).
    """
    from scipy import fft, special

    duration_s = energies.n / energies.rate_hz
    fits: list[_Fit] = []
    n_tests = 0.0
    for wpm in speeds:
        dot_s = 1.2 / wpm
        if lay.length_units(1.0) * dot_s > duration_s:
            continue
        energy, step_s, m, v = energies.grid(dot_s, p)
        k = energy.size
        stretches = _stretches(lay, dot_s, duration_s, max_stretch, grid_units)
        mpos, spos, last = cells(lay, stretches, p)
        fit = last < k
        if not fit.any():
            continue
        stretches, mpos, spos, last = stretches[fit], mpos[fit], spos[fit], last[fit]
        n_t = stretches.size
        # effective tests (module notes): start times one per sub-window, 4 e m per
        # speed step and 2 e per stretch step
        dims = SPEED_TESTS * grid_units * m * (STRETCH_TESTS * grid_units if n_t > 1 else 1.0)
        n_fft = fft.next_fast_len(k)
        spec = fft.fft(energy, n_fft)
        n_tau = k - last
        n_m, n_s = mpos.shape[1], spos.shape[1]
        tau = np.empty(n_t, dtype=int)
        ratio = np.empty(n_t)
        # templates in batches, so that memory stays bounded on long recordings
        batch = max(1, BANK_ELEMENTS // n_fft)
        for lo in range(0, n_t, batch):
            sl = slice(lo, min(lo + batch, n_t))
            bank = np.zeros((sl.stop - sl.start, n_fft), dtype=np.complex128)
            rows = np.arange(bank.shape[0])[:, None]
            bank[rows, mpos[sl]] = 1.0
            bank[rows, spos[sl]] = 1j
            # sum_j q[tau + j] T[j] for T = marks + 1j spaces: mark sums in the real part
            # and space sums in the imaginary part, as q is real
            corr = fft.ifft(spec[None, :] * np.conj(fft.fft(np.conj(bank), axis=1,
                                                            workers=-1)), axis=1, workers=-1)
            corr = corr[:, : int(n_tau[sl].max())]
            q = (corr.real / n_m) / np.maximum(corr.imag / n_s, 1e-300)
            q[np.arange(q.shape[1])[None, :] >= n_tau[sl, None]] = -np.inf
            tau[sl] = np.argmax(q, axis=1)
            ratio[sl] = q[np.arange(q.shape[0]), tau[sl]]
        n_tests += float(np.maximum(1.0, n_tau / p).sum()) * m * dims
        d1, d2 = 2 * m * n_m, 2 * m * n_s
        # P(F > x) = I_{d2/(d2 + d1 x)}(d2/2, d1/2), the regularised incomplete beta
        with np.errstate(divide="ignore"):
            logp = np.log(special.betainc(d2 / 2, d1 / 2, d2 / (d2 + d1 * ratio)))
        for i in np.argsort(logp)[:keep]:
            fits.append(_Fit(float(logp[i]), float(ratio[i]), float(wpm), float(stretches[i]),
                             energies.start_s + tau[i] * step_s, n_m, n_s, m, v))
    fits.sort(key=lambda f: f.logp)
    return fits[:keep], n_tests


def _refine(energies: CellEnergies, lay: Layout, fit: _Fit, *, coarse_units: float,
            fine_units: float, p: int, max_stretch: float) -> _Fit:
    """Search a fine grid of speed, stretch and start around one coarse fit (gathers)."""
    from scipy import special

    length = lay.length_units(1.0)
    s_c, s_f = 4.0 * coarse_units / length, 4.0 * fine_units / length
    n_w = int(math.ceil(s_c / s_f))
    speeds = fit.wpm * (1.0 + s_f) ** np.arange(-n_w, n_w + 1)
    if lay.gap_units:
        g_c, g_f = 4.0 * coarse_units / lay.gap_units, 4.0 * fine_units / lay.gap_units
        n_r = int(math.ceil(g_c / g_f))
        stretches = fit.stretch + g_f * np.arange(-n_r, n_r + 1)
        stretches = stretches[(stretches >= 1.0 - 1e-9) & (stretches <= max_stretch + 1e-9)]
        stretches = np.maximum(stretches, 1.0)
    else:
        stretches = np.ones(1)
    best = fit
    reach = coarse_units + 1.0  # dots of start time around the coarse fit
    for wpm in speeds:
        dot_s = 1.2 / wpm
        energy, step_s, m, v = energies.grid(dot_s, p)
        centre = int(round((fit.start_s - energies.start_s) / step_s))
        taus = np.arange(centre - int(reach * p), centre + int(reach * p) + 1)
        for r in stretches:
            mpos, spos, last = cells(lay, float(r), p)
            ok = taus[(taus >= 0) & (taus + last < energy.size)]
            if ok.size == 0:
                continue
            e_m = energy[ok[:, None] + mpos[None, :]].mean(axis=1)
            e_s = energy[ok[:, None] + spos[None, :]].mean(axis=1)
            q = e_m / np.maximum(e_s, 1e-300)
            i = int(np.argmax(q))
            d1, d2 = 2 * m * mpos.size, 2 * m * spos.size
            with np.errstate(divide="ignore"):
                logp = float(np.log(special.betainc(d2 / 2, d1 / 2, d2 / (d2 + d1 * q[i]))))
            if logp < best.logp:
                best = _Fit(logp, float(q[i]), float(wpm), float(r),
                            energies.start_s + ok[i] * step_s, mpos.size, spos.size, m, v)
    return best


def search(baseband: bb.Baseband, expected: str, *, wpm_range: tuple[float, float] = (5.0, 50.0),
           max_stretch: float = 4.0, coherent_s: float = COHERENT_S,
           coarse_units: float = COARSE_UNITS, fine_units: float = FINE_UNITS,
           n_refine: int = N_REFINE, alpha: float = ALPHA, max_leak: float = MAX_LEAK,
           n_hypotheses: int = 1, source: str = "<array>") -> Detection:
    """Search a baseband for the keying of a known message.

    Parameters
    ----------
    baseband : Baseband
        The recording mixed down at the carrier (:func:`okdecode.baseband.tune`).
    expected : str
        The sent text (ITU-R M.1677-1 characters and ``<AR>`` style signals).
    wpm_range : (float, float)
        Character speeds searched, WPM (PARIS).
    max_stretch : float
        Largest Farnsworth factor on the 3- and 7-unit gaps; 1 searches standard spacing
        only.
    coherent_s : float
        Longest sub-window summed coherently, s.
    coarse_units, fine_units : float
        Misalignment, in dots, that the coarse and the fine grids of speed and stretch
        may leave at the template's ends. The coarse grid, searched over every start
        time by FFT correlation, also sets the effective number of tests.
    n_refine : int
        Best coarse fits searched again on the fine grid.
    alpha : float
        False-alarm probability of a detection.
    max_leak : float
        Pattern check: largest share of the mark cells' excess energy in the spaces.
    n_hypotheses : int
        Carrier hypotheses searched in all (multiplies the number of tests).
    source : str
        Named in error messages.

    Returns
    -------
    Detection
        The best fit, its statistic and the false-alarm probability of the search.

    Raises
    ------
    ParameterError
        If the text has a character without a signal, or an option is out of range.
    """
    from scipy import stats

    lay = layout(expected, source=source)
    lo, hi = _check(source, lay, wpm_range, max_stretch, alpha)
    energies = CellEnergies(baseband, coherent_s=coherent_s)
    speeds = speed_grid(lay, (lo, hi), coarse_units)
    fits, n_tests = _coarse(energies, lay, speeds, max_stretch=max_stretch, p=COARSE_PER_UNIT,
                            grid_units=coarse_units, keep=n_refine)
    if not fits:
        return nothing(alpha=alpha, carrier_hz=baseband.carrier_hz)
    fits = [_refine(energies, lay, f, coarse_units=coarse_units, fine_units=fine_units,
                    p=FINE_PER_UNIT, max_stretch=max_stretch) for f in fits]
    best = min(fits, key=lambda f: f.logp)
    n_tests *= max(int(n_hypotheses), 1)
    single_p = math.exp(best.logp)
    fa = sidak(single_p, n_tests)
    # the pattern check, at the best fit; the noise floor from the lower quartile
    dot_s = 1.2 / best.wpm
    energy, step_s, m, _ = energies.grid(dot_s, FINE_PER_UNIT)
    tau = int(round((best.start_s - energies.start_s) / step_s))
    mpos, spos, last = cells(lay, best.stretch, FINE_PER_UNIT)
    floor = float(np.quantile(energy, 0.25)) / float(stats.gamma.ppf(0.25, m))
    excess = float(energy[tau + mpos].mean()) - floor
    inner = spos[interior_spaces(lay)]
    leak = None
    if excess > 0 and inner.size:
        leak = (float(energy[tau + inner].mean()) - floor) / excess
    pattern_ok = leak is not None and leak <= max_leak
    sub_s = best.v / baseband.rate_hz
    cn0 = _cn0_in_interiors(baseband, lay, best.stretch, best.start_s, dot_s)
    if cn0 is None and best.ratio > 1.0:
        cn0 = 10 * math.log10((best.ratio - 1.0) / sub_s)
    farnsworth = None
    if best.stretch > 1.0 + 1e-9:
        # PARIS: 31 units of characters and 19 of gaps (Bloom, QEX 1990)
        farnsworth = 60.0 / (31 * dot_s + 19 * best.stretch * dot_s)
    return Detection(detected=bool(fa <= alpha and pattern_ok), statistic=best.ratio,
                     false_alarm_probability=fa, wpm=best.wpm, farnsworth_wpm=farnsworth,
                     stretch=best.stretch, start_s=best.start_s,
                     end_s=best.start_s + last / FINE_PER_UNIT * dot_s, cn0_dbhz=cn0,
                     carrier_hz=baseband.carrier_hz, single_p=single_p, n_tests=n_tests,
                     leak=leak, pattern_ok=bool(pattern_ok), alpha=alpha)


def _cn0_in_interiors(baseband: bb.Baseband, lay: Layout, stretch: float, start_s: float,
                      dot_s: float) -> float | None:
    """C/N0 at the fitted template, measured as the decoder measures it, dB-Hz, or None.

    The cells' energy ratio gives C/N0 too, but every cell that a fit's edge misses by a
    little (rise times, a speed a fraction off) mixes mark and space, which at a strong
    signal reads several dB low (2.5 dB at 30 dB-Hz); the template's key-down runs are
    taken as marks instead, and :func:`okdecode.report.measure` keeps to their
    interiors and those of the spaces.
    """
    from .marks import Levels, Marks
    from .report import measure

    fixed = np.where(lay.stretchable, 0, lay.units).astype(float)
    gaps = np.where(lay.stretchable, lay.units, 0).astype(float)
    run_start = np.concatenate([[0.0], np.cumsum(fixed + stretch * gaps)[:-1]])
    run_end = run_start + fixed + stretch * gaps
    on = lay.key_down
    a = start_s + run_start[on] * dot_s
    b = start_s + run_end[on] * dot_s
    empty = np.empty(0)
    marks = Marks(start_s=a, end_s=b, level=np.ones(a.size), peak_snr_db=np.zeros(a.size),
                  levels=Levels(empty, empty, empty, empty, empty), source="")
    level = measure(baseband, marks, dot_s=dot_s, detection_bandwidth_hz=1.0 / dot_s,
                    is_complex=True)
    return level.cn0_dbhz


def search_capture(capture: Capture, expected: str, *, baseband: bb.Baseband | None = None,
                   spectrum: bb.Spectrum | None = None, carrier_hz: float | None = None,
                   channel: int | None = None, n_candidates: int = 4, n_messages: int = 1,
                   **options) -> Detection:
    """Known-message search in a capture, tuning first where no baseband is given.

    Parameters
    ----------
    capture : Capture
    expected : str
    baseband : Baseband, optional
        The decoder's baseband (``Reception.baseband``); used as it is.
    spectrum : Spectrum, optional
        The decoder's carrier search (``Reception.spectrum``), when it found no keyed
        carrier: the bins with the highest keying scores and the strongest bins are then
        tried, each with its peak in a fine spectrum (Welch).
    carrier_hz : float, optional
        Carrier given by the user: tuned to, with a fine offset search.
    channel : int, optional
    n_candidates : int
        Carrier bins tried when the carrier is not known.
    n_messages : int
        Expected texts searched for in all (multiplies the number of tests).
    **options
        As for :func:`search`.

    Returns
    -------
    Detection
        The best of the carriers tried, its false-alarm probability corrected for all of
        them.
    """
    n_messages = max(int(n_messages), 1)
    if baseband is not None:
        return search(baseband, expected, source=capture.source, n_hypotheses=n_messages,
                      **options)
    chan = 0 if channel is None else channel
    hypotheses: list[bb.Baseband] = []
    if carrier_hz is not None:
        base = bb.tune(capture, carrier_hz, channel=chan)
        hypotheses.append(bb.shift(base, bb.fine_offset_hz(base, max_offset_hz=40.0)))
    else:
        if spectrum is None:
            spectrum = bb.search_carriers(capture)
        f = spectrum.frequency_hz
        rel = f - capture.center_hz
        ok = np.ones(f.size, dtype=bool)
        if not capture.is_complex:
            ok &= (rel >= 100.0) & (rel <= capture.rate_hz / 2 - 2 * spectrum.bin_hz)
        else:
            ok &= np.abs(rel) <= capture.rate_hz / 2 - 2 * spectrum.bin_hz
        # the bins most keyed and the strongest bins, alternately: below the search's
        # threshold either may rank the carrier first
        rankings = [np.where(ok, spectrum.score[chan], -np.inf),
                    np.where(ok, spectrum.power_dbfs[chan], -np.inf)]
        orders = [list(np.argsort(-r)) for r in rankings]
        picked: list[int] = []
        while len(picked) < n_candidates and any(orders):
            for order, ranking in zip(orders, rankings, strict=True):
                while order and (not np.isfinite(ranking[order[0]])
                                 or any(abs(int(order[0]) - q) <= 1 for q in picked)):
                    order.pop(0)
                if order and len(picked) < n_candidates:
                    picked.append(int(order.pop(0)))
        for b in picked:
            base = bb.tune(capture, float(f[b]), channel=chan)
            # the carrier lies within half a bin of this one or of a neighbour left out
            # above: the peak of a fine spectrum finds it
            offset = bb.fine_offset_hz(base, max_offset_hz=1.5 * spectrum.bin_hz)
            hypotheses.append(bb.shift(base, offset))
    if not hypotheses:
        return nothing(alpha=options.get("alpha", ALPHA), carrier_hz=carrier_hz)
    n_hyp = len(hypotheses) * n_messages
    results = [search(h, expected, source=capture.source, n_hypotheses=n_hyp, **options)
               for h in hypotheses]
    scored = [r for r in results if r.single_p is not None]
    if not scored:
        return results[0]
    return min(scored, key=lambda r: r.single_p)
