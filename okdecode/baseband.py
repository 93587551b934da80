"""Stage 1: Capture -> Envelope. Carrier search, mixing, low-pass, decimation, envelope.

The chain makes two passes over the capture at its own rate and no more:

1. :func:`search_carriers` frames the samples, takes each frame's power spectrum and
   keeps per frequency bin the statistics of its power from frame to frame. A keyed
   carrier's power switches slowly between two levels, so it is correlated from one
   frame to the next; noise is not, and neither is a steady carrier or hum, whose
   power stays put. The autocorrelation of each bin's log power (relative to the
   frame's median bin), summed over lags of one to four frames and of one to eight,
   is the keying score (under the null each lag's is about N(0, 1/n) for n frames).
2. :class:`Downconverter` mixes the chosen carrier to 0 Hz and decimates in polyphase
   FIR stages to a complex baseband of about 1 kHz, which is kept: everything after
   (fine tuning, the matched envelope, re-tuning once the speed is known, the C/N0
   measurement) works on it, at a thousandth of the work.

References
----------
.. [1] P. D. Welch, "The use of fast Fourier transform for the estimation of power
   spectra", IEEE Trans. Audio Electroacoust. 15(2), 1967.
.. [2] R. E. Crochiere and L. R. Rabiner, "Multirate Digital Signal Processing",
   Prentice-Hall, 1983 (multistage decimation, polyphase filters).
.. [3] J. F. Kaiser, "Nonrecursive digital filter design using the I0-sinh window
   function", Proc. IEEE ISCAS, 1974.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np

from .capture import Capture
from .errors import ParameterError

#: Half-width of the band kept in the stored baseband, Hz: the keying sidebands at
#: 50 WPM, a coarse carrier error and some drift all fit inside it.
BASEBAND_HALF_BAND_HZ = 250.0
#: The stored baseband runs at a rate in [BASEBAND_MIN_HZ, 2 * BASEBAND_MIN_HZ).
BASEBAND_MIN_HZ = 750.0
#: Length of one analysis frame of the carrier search, s: about 77 Hz resolution, a
#: frame shorter than a dot at 50 WPM, and a frame rate (76.9 Hz) at which the 50 and
#: 60 Hz beats of mains hum harmonics (with each other and with their images) alias to
#: 0.65 and 0.78 of the frame rate, far from 0 Hz, so a steady hum does not swing
#: slowly from frame to frame the way keying does (the frame's length is rounded to a
#: fast FFT length, which moves these by a few per cent at most).
SEARCH_FRAME_S = 0.013
#: A keyed bin's log power varies at least this much (variance, natural log): noise
#: alone gives pi²/6 = 1.64, keying more; a steady carrier 10 dB above the noise in its
#: bin gives about 0.2 and less the stronger it is.
MIN_KEYED_SPREAD = 0.5
#: The search sums the power autocorrelation over lags 1..K for each K here, in frames
#: (52 and 104 ms): the short sum suits fast keying, the long one slow keying, whose
#: power stays correlated over many frames.
SEARCH_LAG_SUMS = (4, 8)
SEARCH_LAGS = max(SEARCH_LAG_SUMS)
#: A keyed bin this far under the strongest keyed bin of its channel is taken after
#: every other, dB: the leakage of a carrier's keying (window sidelobes, harmonics) lies
#: further down than this, a second station worth decoding first rarely does.
DOMINATED_DB = 30.0
#: A keyed bin whose log power's autocovariance at SEARCH_LAGS frames is over this
#: fraction of the one at one frame changes too smoothly for keying (a fading carrier).
FADING_SMOOTHNESS = 0.9
#: Floor of a bin's power relative to its frame's median bin, before the log.
LOG_POWER_FLOOR = 0.05
#: The carrier search judges keying over segments of this length, s, so that a short
#: message in a long quiet recording is not diluted.
SEARCH_SEGMENT_S = 20.0


# ---------------------------------------------------------------------------------------
# Pass 1: where is a keyed carrier?


@dataclass(frozen=True)
class Carrier:
    """One candidate keyed carrier found by the search."""

    frequency_hz: float  # absolute (center_hz included)
    channel: int
    score: float  # largest segment z-score of the summed log-power autocorrelation
    keyed_power: float  # summed autocovariance of log power (strength of the keying)
    level_db: float  # mean bin power over the noise floor, dB
    width_hz: float = 0.0  # span of the keyed bins around it (wide: a pulsed carrier), Hz
    centroid_hz: float | None = None  # power-weighted centre of that span, absolute, Hz


@dataclass(frozen=True)
class Spectrum:
    """The result of the carrier search: a mean spectrum and the keyed candidates."""

    frequency_hz: np.ndarray  # shape (n_bins,), absolute, ascending
    power_dbfs: np.ndarray  # shape (n_channels, n_bins), mean frame power, dB full scale
    score: np.ndarray  # shape (n_channels, n_bins), keying z-score
    threshold: float  # z-score above which a bin counts as keyed
    carriers: tuple[Carrier, ...]  # strongest keyed first; empty if none
    bin_hz: float  # frequency spacing of the bins
    n_frames: int


class KeyingSearch:
    """Streaming frame statistics per frequency bin for :func:`search_carriers`.

    Feeding the capture block by block equals one pass over it.
    """

    def __init__(self, *, rate_hz: float, n_channels: int, is_complex: bool,
                 center_hz: float = 0.0, frame_s: float = SEARCH_FRAME_S,
                 segment_s: float = SEARCH_SEGMENT_S):
        self.rate_hz, self.is_complex, self.center_hz = rate_hz, is_complex, center_hz
        from scipy import fft

        self._fft = fft
        self.frame_len = fft.next_fast_len(max(16, int(round(frame_s * rate_hz))), real=True)
        n = self.frame_len
        self._window = np.hanning(n + 2)[1:-1].astype(np.float32)
        # full-scale sine -> 0 dBFS in its bin: a real sine of amplitude 1 gives
        # |X|² = (sum(w)/2)², a complex exponential of amplitude 1 gives sum(w)².
        self._scale = (2.0 if not is_complex else 1.0) / float(np.sum(self._window)) ** 2
        self.n_bins = n if is_complex else n // 2 + 1
        shape = (n_channels, self.n_bins)
        self._sum = np.zeros(shape)
        # S1, S2 and the lagged products S(l) for l = 1..SEARCH_LAGS
        self._seg = [np.zeros(shape) for _ in range(2 + SEARCH_LAGS)]
        self._seg_n = 0
        self._best_z = np.full(shape, -np.inf)
        self._best_cov = np.zeros(shape)
        self._best_spread = np.zeros(shape)  # variance of log power in the best segment
        # the autocovariance at the longest lag over that at one frame, in the best segment
        self._best_smooth = np.zeros(shape)
        self._last = np.empty((n_channels, 0, self.n_bins))  # the frames before this block
        self._pending = np.empty((0, n_channels), dtype=np.complex64 if is_complex
                                 else np.float32)
        self.n_frames = 0
        self.n_segments = 0
        self._frames_per_segment = max(16, int(segment_s * rate_hz / n))

    def process(self, block: np.ndarray) -> None:
        """Take the next ``(n, n_channels)`` block of samples."""
        buf = np.concatenate([self._pending, block.astype(self._pending.dtype, copy=False)])
        n_frames = buf.shape[0] // self.frame_len
        self._pending = buf[n_frames * self.frame_len:]
        if n_frames == 0:
            return
        frames = buf[: n_frames * self.frame_len].reshape(n_frames, self.frame_len, -1)
        frames = frames.transpose(2, 0, 1) * self._window  # (channels, frames, n)
        if self.is_complex:
            spec = np.fft.fftshift(self._fft.fft(frames, axis=-1), axes=-1)
        else:
            spec = self._fft.rfft(frames, axis=-1)
        power = (spec.real**2 + spec.imag**2) * self._scale  # (channels, frames, bins)
        start = 0
        while start < n_frames:
            take = min(n_frames - start, self._frames_per_segment - self._seg_n)
            self._accumulate(power[:, start : start + take])
            start += take
            if self._seg_n >= self._frames_per_segment:
                self._close_segment()

    def _accumulate(self, raw: np.ndarray) -> None:
        self._sum += raw.sum(axis=1)
        # log power, each frame relative to its own median bin (mostly noise). The log
        # tames the exponential tails of noise power, so the autocorrelation's null
        # distribution is close to normal for a few hundred frames; the median takes
        # out a receiver's AGC, which lifts the whole band in the spaces and would
        # otherwise key every bin but the carrier's
        # and the floor at a twentieth of the median cuts the log's long lower tail
        # (noise power near zero), which alone would make that distribution heavy
        tiny = np.finfo(np.float32).tiny
        median = np.maximum(np.median(raw, axis=2, keepdims=True), tiny)
        p = np.log(np.maximum(raw / median, LOG_POWER_FLOOR))
        s1, s2, *lagged = self._seg
        s1 += p.sum(axis=1)
        s2 += np.einsum("cfb,cfb->cb", p, p)
        both = np.concatenate([self._last, p], axis=1)
        k = self._last.shape[1]
        for lag, acc in enumerate(lagged, start=1):
            lo = max(k - lag, 0)  # pairs (i - lag, i) with i a frame of this block
            end = both.shape[1] - lag
            if end > lo:
                acc += np.einsum("cfb,cfb->cb", both[:, lo + lag :], both[:, lo:end])
        self._last = both[:, -SEARCH_LAGS:].copy()
        self._seg_n += p.shape[1]
        self.n_frames += p.shape[1]

    def _close_segment(self) -> None:
        n = self._seg_n
        if n >= 8:
            s1, s2, *lagged = self._seg
            mean = s1 / n
            var = np.maximum(s2 / n - mean**2, 1e-300)
            covs = []
            for lag, acc in enumerate(lagged, start=1):
                # a segment's first frames pair with the frames before it, except in the
                # first segment
                n_pairs = n if self.n_segments else n - lag
                covs.append(acc / max(n_pairs, 1) - mean**2)
            # under the null each lag's autocorrelation is about N(0, 1/n), independently,
            # so a sum of k of them is about N(0, k/n)
            z = np.full_like(mean, -np.inf)
            cov = np.zeros_like(mean)
            for k in SEARCH_LAG_SUMS:
                cov_k = np.sum(covs[:k], axis=0)
                z_k = cov_k / var * math.sqrt(n / k)
                cov = np.where(z_k > z, cov_k / k, cov)
                z = np.maximum(z, z_k)
            better = z > self._best_z
            self._best_z = np.where(better, z, self._best_z)
            self._best_cov = np.where(better, cov, self._best_cov)
            self._best_spread = np.where(better, var, self._best_spread)
            smooth = covs[-1] / np.where(covs[0] > 0, covs[0], np.inf)
            self._best_smooth = np.where(better, smooth, self._best_smooth)
            self.n_segments += 1
        self._seg = [np.zeros_like(a) for a in self._seg]
        self._seg_n = 0

    def result(self, *, min_hz: float = 0.0, max_candidates: int = 8,
               own_span: bool = True) -> Spectrum:
        """The spectrum and the keyed carriers, strongest first.

        Parameters
        ----------
        min_hz : float
            Real captures: bins below this frequency are not candidates (DC, hum), Hz.
        max_candidates : int
            At most this many carriers are returned.
        own_span : bool
            A carrier owns the whole span its keying spreads over (a spark train's
            comb is one carrier), not only its window's main lobe.
        """
        if self._seg_n >= 8 or self.n_segments == 0:
            self._close_segment()
        n_frames = max(self.n_frames, 1)
        mean = self._sum / n_frames
        if self.is_complex:
            freq = np.fft.fftshift(np.fft.fftfreq(self.frame_len, 1.0 / self.rate_hz))
        else:
            freq = np.fft.rfftfreq(self.frame_len, 1.0 / self.rate_hz)
        freq = freq + self.center_hz
        bin_hz = self.rate_hz / self.frame_len
        floor = np.maximum(np.median(mean, axis=1, keepdims=True), 1e-300)
        z = np.where(np.isfinite(self._best_z), self._best_z, 0.0)
        valid = np.ones(self.n_bins, dtype=bool)
        if not self.is_complex:
            valid &= (freq - self.center_hz) >= max(min_hz, 1.5 * bin_hz)
            valid &= (freq - self.center_hz) <= self.rate_hz / 2 - 1.5 * bin_hz
        n_tests = max(int(valid.sum()) * z.shape[0] * max(self.n_segments, 1)
                      * len(SEARCH_LAG_SUMS), 1)
        # Bonferroni over every bin, segment and lag sum at a 1 % false-alarm rate in
        # all. The statistic is a quadratic form whose far tail is heavier than the
        # normal's (in simulations of white series, 5 times at z = 4.3 for four lags),
        # so the normal's level is asked for at a hundredth of that rate
        threshold = max(4.0, math.sqrt(2.0 * math.log(n_tests / 1e-4)))
        keyed_power = self._best_cov  # of log power: grows with the keyed carrier's SNR
        found: list[Carrier] = []
        taken = np.zeros_like(z, dtype=bool)
        # the strongest keying first: the log power's autocovariance, which grows with
        # the SNR in the bin and, unlike the mean power, is small for a steady carrier
        # that fades. Where a receiver's narrow filter has taken the noise away, a strong
        # carrier's far leakage (the window's sidelobes, a harmonic) is keyed at a higher
        # SNR than the carrier itself; so bins more than DOMINATED_DB under the strongest
        # keyed bin of their channel come after all the others
        keyed = valid[None, :] & (z >= threshold) & (keyed_power > 0) & (
            self._best_spread >= MIN_KEYED_SPREAD)
        strongest = np.max(np.where(keyed, mean, 0.0), axis=1, keepdims=True)
        dominated = mean < strongest * 10 ** (-DOMINATED_DB / 10)
        # keying switches: its power decorrelates within a few elements, while a fading
        # steady carrier's swings smoothly over seconds and is as correlated 8 frames on
        # as 1 (a random keying of 5 WPM keeps about 0.7 of it, a fade of a 3 s period
        # 0.98): among the bins not dominated, such bins come after the others
        fading = self._best_smooth > FADING_SMOOTHNESS
        order = np.lexsort((-keyed_power.ravel(), fading.ravel(), dominated.ravel()))
        for flat in order:
            ch, b = np.unravel_index(flat, z.shape)
            if not valid[b] or z[ch, b] < threshold or keyed_power[ch, b] <= 0:
                continue
            if self._best_spread[ch, b] < MIN_KEYED_SPREAD:
                # its power hardly moves: a steady carrier that beats a little with a
                # neighbour swings slowly, but it is not keyed
                continue
            if taken[:, b].any():
                continue
            lo, hi = _keyed_span(mean[ch], z[ch], b, threshold)
            width_hz = (hi - lo) * bin_hz
            excess = np.maximum(mean[ch, lo:hi] - floor[ch, 0], 0.0)
            centroid = (float(np.sum(freq[lo:hi] * excess) / np.sum(excess))
                        if excess.sum() > 0 else None)
            # a carrier owns its neighbours (the Hann main lobe and near leakage) and the
            # span its keying spreads over; the same carrier in another channel is not
            # another carrier
            if own_span:
                taken[:, max(0, min(lo, b - 3)) : min(self.n_bins, max(hi, b + 4))] = True
            else:
                taken[:, max(0, b - 3) : min(self.n_bins, b + 4)] = True
            found.append(Carrier(frequency_hz=float(freq[b] + _peak_offset(mean[ch], b) * bin_hz),
                                 channel=int(ch), score=float(z[ch, b]),
                                 keyed_power=float(keyed_power[ch, b]),
                                 level_db=float(10 * np.log10(mean[ch, b] / floor[ch, 0])),
                                 width_hz=float(width_hz), centroid_hz=centroid))
            if len(found) >= max_candidates:
                break
        return Spectrum(frequency_hz=freq, power_dbfs=10 * np.log10(np.maximum(mean, 1e-30)),
                        score=z, threshold=threshold, carriers=tuple(found), bin_hz=bin_hz,
                        n_frames=self.n_frames)


def _keyed_span(mean: np.ndarray, z: np.ndarray, b: int, threshold: float,
                max_gap: int = 3) -> tuple[int, int]:
    """Bins [lo, hi) around b that are keyed and hold a hundredth of b's power or more.

    Gaps of up to ``max_gap`` bins are bridged, so the comb of a spark train counts as
    one carrier. The power bound keeps out a strong carrier's far leakage, which is as
    keyed as the carrier itself where a receiver's filter has taken the noise away.
    """
    ok = (mean >= 0.01 * mean[b]) & (z >= threshold)
    lo = hi = b
    gap = 0
    while lo > 0 and gap <= max_gap:
        lo -= 1
        gap = 0 if ok[lo] else gap + 1
    lo += gap
    gap = 0
    while hi < mean.size - 1 and gap <= max_gap:
        hi += 1
        gap = 0 if ok[hi] else gap + 1
    hi -= gap
    return lo, hi + 1


def _peak_offset(power: np.ndarray, b: int) -> float:
    """Parabolic interpolation of a spectral peak on log power, in bins (|x| <= 0.5)."""
    if b <= 0 or b >= power.size - 1:
        return 0.0
    a, c, d = np.log(np.maximum(power[b - 1 : b + 2].astype(np.float64), 1e-300))
    den = a - 2 * c + d
    if not den < 0:  # a flat top, or a silent recording
        return 0.0
    return float(np.clip(0.5 * (a - d) / den, -0.5, 0.5))


def search_carriers(capture: Capture, *, min_hz: float = 100.0, progress=None,
                    frame_s: float = SEARCH_FRAME_S, own_span: bool = True) -> Spectrum:
    """Find the keyed carriers in a capture (one pass over its samples).

    Parameters
    ----------
    capture : Capture
        The recording, every channel.
    min_hz : float
        Real captures: lowest frequency considered, Hz (keeps DC and mains hum out).
    progress : callable, optional
        Called with the number of samples handled after each block.
    frame_s : float
        Frame length, s: ``SEARCH_FRAME_S`` by default; three times that resolves
        carriers a third as far apart, for keying up to about 30 WPM.
    own_span : bool
        See :meth:`KeyingSearch.result`.

    Returns
    -------
    Spectrum
        ``carriers`` lists the bins whose power is keyed, strongest first; it is empty
        for noise, a steady carrier or hum.

    Notes
    -----
    For n independent frames of noise, or of a steady carrier in noise, the sample
    autocorrelation of a bin's log power at each lag is close to N(0, 1/n) (Bartlett's
    formula for white series), so the sum of K lags gives ``z = sum(r) * sqrt(n / K)``
    (K = 4 and 8, the larger z kept), compared with a Bonferroni threshold over all
    bins, segments and both sums. Keying correlates
    the power of nearby frames, since a mark or a space outlasts a 13 ms frame at any
    speed up to 50 WPM.
    """
    search = KeyingSearch(rate_hz=capture.rate_hz, n_channels=capture.n_channels,
                          is_complex=capture.is_complex, center_hz=capture.center_hz,
                          frame_s=frame_s)
    for block in capture.blocks():
        search.process(block)
        if progress is not None:
            progress(block.shape[0])
    return search.result(min_hz=min_hz, own_span=own_span)


# ---------------------------------------------------------------------------------------
# Pass 2: mix and decimate


class FirDecimator:
    """Polyphase FIR low-pass and decimation of a real float32 stream, state kept.

    ``y[m] = sum_i h[i] x[m*D + D - 1 - i]``: the (M, D) reshape of the input lets each
    polyphase branch be one matrix-vector product on contiguous rows.
    """

    def __init__(self, taps: np.ndarray, factor: int):
        d = int(factor)
        p = -(-taps.size // d)
        padded = np.concatenate([np.zeros(p * d - taps.size), taps])
        self.factor, self.n_branches = d, p
        self.delay = (p * d - taps.size) + (taps.size - 1) / 2.0  # input samples
        self._g = np.ascontiguousarray(padded[::-1].reshape(p, d), dtype=np.float32)
        self._hist = np.zeros((p - 1) * d, dtype=np.float32)

    def process(self, x: np.ndarray) -> np.ndarray:
        buf = np.concatenate([self._hist, x.astype(np.float32, copy=False)])
        d, p = self.factor, self.n_branches
        rows = buf.size // d
        m = rows - (p - 1)
        if m <= 0:
            self._hist = buf
            return np.empty(0, dtype=np.float32)
        x2 = buf[: rows * d].reshape(rows, d)
        y = x2[0:m] @ self._g[0]
        for k in range(1, p):
            y += x2[k : k + m] @ self._g[k]
        self._hist = buf[m * d :]
        return y

    @property
    def start_offset(self) -> float:
        """Time of output 0 after input 0, in input samples."""
        return self.factor - 1 - self.delay


def plan_decimation(rate_hz: float, *, min_out_hz: float = BASEBAND_MIN_HZ) -> list[int]:
    """Stage factors for decimating to a rate in ``[min_out_hz, 2 * min_out_hz)``.

    The total factor is the largest one whose prime factors are all at most 7, and the
    stages take the largest factors first, each at most 16 (common practice: the first
    stage, at the highest rate, does the most with a short filter).

    Examples
    --------
    >>> plan_decimation(48000.0), plan_decimation(8000.0), plan_decimation(4000.0)
    ([16, 4], [10], [5])
    """
    best = 1
    top = int(rate_hz // min_out_hz)
    for total in range(top, max(int(rate_hz // (2 * min_out_hz)), 0), -1):
        if _max_prime(total) <= 7:
            best = total
            break
    if best <= 1:
        return []
    primes = _primes(best)
    stages: list[int] = []
    current = 1
    for q in sorted(primes, reverse=True):
        if current * q > 16:
            stages.append(current)
            current = 1
        current *= q
    stages.append(current)
    return sorted(stages, reverse=True)


def _primes(n: int) -> list[int]:
    out, q = [], 2
    while q * q <= n:
        while n % q == 0:
            out.append(q)
            n //= q
        q += 1
    if n > 1:
        out.append(n)
    return out


def _max_prime(n: int) -> int:
    return max(_primes(n)) if n > 1 else 1


def design_stage(rate_in_hz: float, factor: int, half_band_hz: float,
                 atten_db: float = 75.0) -> np.ndarray:
    """Kaiser-window low-pass for one decimation stage.

    The band ``|f| < half_band_hz`` is kept; everything that would alias into it,
    ``|f| > rate_out - half_band_hz``, is attenuated by ``atten_db`` [3]_.
    """
    from scipy import signal

    rate_out = rate_in_hz / factor
    width_hz = max(rate_out - 2 * half_band_hz, 0.05 * rate_out)
    numtaps, beta = signal.kaiserord(atten_db, width_hz / (rate_in_hz / 2))
    numtaps |= 1  # odd: a whole-sample group delay
    return signal.firwin(numtaps, rate_out / 2, window=("kaiser", beta), fs=rate_in_hz)


class Downconverter:
    """Mix to baseband, low-pass, decimate. Feeding it block by block equals one pass.

    Parameters
    ----------
    rate_hz : float
        Input sample rate, Hz.
    carrier_hz : float
        Frequency mixed to 0 Hz, relative to the capture's 0 Hz (for I/Q, baseband
        frequency, may be negative), Hz.
    is_complex : bool
        Whether the input is complex (I/Q).
    half_band_hz : float
        Half-width of the band protected from aliasing in the output, Hz.
    wide_half_band_hz : float, optional
        For a pulsed or damped-wave carrier, whose key-down spreads over a band far
        wider than keying: the chain first decimates to a rate that keeps
        ``±wide_half_band_hz``, takes the power there (so the bursts are summed
        noncoherently, whatever their phases), and decimates that power alongside the
        narrow baseband; :meth:`take_power` hands it out. Also kept: the spectrum of
        that power's fluctuations, where a spark train shows its rate.
    """

    def __init__(self, *, rate_hz: float, carrier_hz: float, is_complex: bool,
                 half_band_hz: float = BASEBAND_HALF_BAND_HZ,
                 min_out_hz: float = BASEBAND_MIN_HZ,
                 wide_half_band_hz: float | None = None):
        self.rate_hz, self.carrier_hz, self.is_complex = rate_hz, carrier_hz, is_complex
        self.wide_half_band_hz = wide_half_band_hz
        wide = wide_half_band_hz is not None and wide_half_band_hz > half_band_hz
        if wide:
            first = plan_decimation(rate_hz, min_out_hz=2.2 * wide_half_band_hz)
        else:
            first = plan_decimation(rate_hz, min_out_hz=min_out_hz)
        self.stages: list[tuple[FirDecimator, FirDecimator]] = []
        rate = rate_hz
        offset = 0.0  # time of output 0 after input 0, s
        for factor in first:
            taps = design_stage(rate, factor, wide_half_band_hz if wide else half_band_hz)
            self.stages.append((FirDecimator(taps, factor), FirDecimator(taps, factor)))
            offset += self.stages[-1][0].start_offset / rate
            rate /= factor
        self.wide_rate_hz = rate
        # the narrow branch and, for a wide carrier, its power branch, with equal filters
        # so their outputs stay aligned
        self.narrow: list[tuple[FirDecimator, FirDecimator]] = []
        self.power_stages: list[FirDecimator] = []
        self.power_bandwidth_hz: float | None = None
        if wide:
            self.power_bandwidth_hz = self._chain_noise_bandwidth_hz()
            for factor in plan_decimation(rate, min_out_hz=min_out_hz):
                taps = design_stage(rate, factor, half_band_hz)
                self.narrow.append((FirDecimator(taps, factor), FirDecimator(taps, factor)))
                self.power_stages.append(FirDecimator(taps, factor))
                offset += self.narrow[-1][0].start_offset / rate
                rate /= factor
        self.factors = first + [st[0].factor for st in self.narrow]
        self.out_rate_hz = rate
        self.start_s = offset
        self._power_parts: list[np.ndarray] = []
        self._pulse = _PulseSpectrum(self.wide_rate_hz) if wide else None
        self._step_rad = 2 * math.pi * carrier_hz / rate_hz
        self._phase_rad = 0.0
        self._table_len = 0
        self._cos = self._sin = np.empty(0, dtype=np.float32)

    def _chain_noise_bandwidth_hz(self) -> float:
        """Two-sided noise bandwidth of the first stages, at their output, Hz."""
        from scipy import signal

        f = np.linspace(-self.wide_rate_hz / 2, self.wide_rate_hz / 2, 4097)
        h = np.ones(f.size, dtype=complex)
        rate = self.rate_hz
        for dec, _ in self.stages:
            taps = dec._g[::-1].ravel()
            h *= signal.freqz(taps, worN=f, fs=rate)[1]
            rate /= dec.factor
        gain = np.abs(h) ** 2
        area = float(np.sum(0.5 * (gain[1:] + gain[:-1])) * (f[1] - f[0]))  # trapezoids
        return area / float(gain[f.size // 2])

    def _tables(self, n: int) -> tuple[np.ndarray, np.ndarray]:
        if n > self._table_len:
            arg = self._step_rad * np.arange(n, dtype=np.float64)
            self._cos = np.cos(arg).astype(np.float32)
            self._sin = np.sin(arg).astype(np.float32)
            self._table_len = n
        return self._cos[:n], self._sin[:n]

    def process(self, block: np.ndarray) -> np.ndarray:
        """Next block of samples (1-D) to the next baseband samples (complex64)."""
        n = block.shape[0]
        if n == 0:
            return np.empty(0, dtype=np.complex64)
        cos_t, sin_t = self._tables(n)
        c, s = math.cos(self._phase_rad), math.sin(self._phase_rad)
        # e^{-j(phase + step n)} = cos - j sin, from the tables and the block's phase
        lo_cos = np.float32(c) * cos_t - np.float32(s) * sin_t
        lo_sin = np.float32(s) * cos_t + np.float32(c) * sin_t
        if self.is_complex:
            xr, xi = block.real.astype(np.float32), block.imag.astype(np.float32)
            i_part = xr * lo_cos + xi * lo_sin
            q_part = xi * lo_cos - xr * lo_sin
        else:
            x = block.astype(np.float32, copy=False)
            i_part, q_part = x * lo_cos, -(x * lo_sin)
        self._phase_rad = (self._phase_rad + self._step_rad * n) % (2 * math.pi)
        for dec_i, dec_q in self.stages:
            i_part, q_part = dec_i.process(i_part), dec_q.process(q_part)
        if self._pulse is not None:
            power = i_part * i_part + q_part * q_part
            self._pulse.process(power)
            for dec in self.power_stages:
                power = dec.process(power)
            self._power_parts.append(power)
            for dec_i, dec_q in self.narrow:
                i_part, q_part = dec_i.process(i_part), dec_q.process(q_part)
        out = np.empty(i_part.size, dtype=np.complex64)
        out.real, out.imag = i_part, q_part
        return out

    def take_power(self) -> np.ndarray:
        """Power of the wide band made since the last call (float32), at the output rate."""
        parts, self._power_parts = self._power_parts, []
        return np.concatenate(parts) if parts else np.empty(0, dtype=np.float32)

    def pulse_spectrum(self) -> tuple[np.ndarray, np.ndarray] | None:
        """Frequencies (Hz) and mean spectrum of the wide power's fluctuations, or None."""
        return None if self._pulse is None else self._pulse.result()

    def flush(self) -> np.ndarray:
        """Push zeros through so the last input samples come out, then reset."""
        n, scale = 0, 1
        for dec, _ in self.stages + self.narrow:  # each stage's history, in input samples
            n += dec.n_branches * dec.factor * scale
            scale *= dec.factor
        return self.process(np.zeros(n, dtype=np.complex64 if self.is_complex else np.float32))


class _PulseSpectrum:
    """Welch average of a power stream's spectrum (mean removed per segment)."""

    def __init__(self, rate_hz: float, segment_s: float = 0.5):
        self.rate_hz = rate_hz
        self.n = max(64, 1 << int(math.ceil(math.log2(segment_s * rate_hz))))
        self._window = np.hanning(self.n).astype(np.float32)
        self._pending = np.empty(0, dtype=np.float32)
        self._sum = np.zeros(self.n // 2 + 1)
        self._count = 0

    def process(self, power: np.ndarray) -> None:
        buf = np.concatenate([self._pending, power])
        k = buf.size // self.n
        self._pending = buf[k * self.n :]
        if k:
            seg = buf[: k * self.n].reshape(k, self.n)
            seg = (seg - seg.mean(axis=1, keepdims=True)) * self._window
            spec = np.fft.rfft(seg, axis=1)
            self._sum += (spec.real**2 + spec.imag**2).sum(axis=0)
            self._count += k

    def result(self) -> tuple[np.ndarray, np.ndarray] | None:
        if self._count == 0:
            return None
        return np.fft.rfftfreq(self.n, 1.0 / self.rate_hz), self._sum / self._count


def spark_rate_hz(freq_hz: np.ndarray, spectrum: np.ndarray, *,
                  min_hz: float = 50.0) -> float | None:
    """Repetition rate of a pulse train from the spectrum of its power, Hz, or None.

    A train of bursts at rate r puts lines at r, 2r, 3r, ... into the spectrum of its
    power. The strongest line that stands 10 dB above the median level is taken, then
    the lowest of its subharmonics r/2, r/3, r/4 that still holds a line at least a
    third as strong (the fundamental of a train can be weaker than its harmonics).
    """
    band = (freq_hz >= min_hz) & (freq_hz <= 0.9 * freq_hz[-1])
    if band.sum() < 16:
        return None
    f, p = freq_hz[band], spectrum[band]
    floor = float(np.median(p))
    peak = int(np.argmax(p))
    if floor <= 0 or p[peak] < 10.0 * floor:
        return None
    best = float(f[peak])
    df = f[1] - f[0]
    for k in (4, 3, 2):
        sub = best / k
        near = np.abs(f - sub) <= max(2 * df, 0.02 * sub)
        if sub >= min_hz and near.any() and p[near].max() >= p[peak] / 3.0:
            i = np.flatnonzero(near)[np.argmax(p[near])]
            return float(f[i] + _peak_offset(p, int(i)) * df)
    return float(best + _peak_offset(p, peak) * df)


@dataclass(frozen=True)
class Baseband:
    """The capture mixed down at the carrier and decimated, kept whole (about 1 kHz)."""

    samples: np.ndarray  # shape (n,), complex64, full-scale units as in the capture
    rate_hz: float
    start_s: float  # time of samples[0] from the start of the capture, s
    carrier_hz: float  # absolute frequency now at 0 Hz
    channel: int
    duration_s: float  # of the capture
    half_band_hz: float  # protected band |f| < half_band_hz
    # a pulsed or damped-wave carrier: the power of its whole band, noncoherently
    # (float32, same times as samples), that band's two-sided noise bandwidth, and the
    # repetition rate of its bursts when one shows
    power: np.ndarray | None = field(default=None, repr=False)
    power_bandwidth_hz: float | None = None
    spark_rate_hz: float | None = None


@dataclass(frozen=True)
class Tuning:
    """One carrier to tune: its absolute frequency, channel and (pulsed) wide band."""

    carrier_hz: float
    channel: int = 0
    wide_half_band_hz: float | None = None


def tune(capture: Capture, carrier_hz: float, *, channel: int = 0,
         wide_half_band_hz: float | None = None, progress=None) -> Baseband:
    """Mix a capture's carrier to 0 Hz and decimate it to about 1 kHz (one pass).

    Parameters
    ----------
    capture : Capture
    carrier_hz : float
        Absolute carrier frequency, Hz.
    channel : int
        Channel index.
    wide_half_band_hz : float, optional
        Half-width of a pulsed carrier's band, Hz: see :class:`Downconverter`.
    progress : callable, optional
        Called with the number of samples handled after each block.

    Raises
    ------
    ParameterError
        If the carrier lies outside what the capture's rate can hold.
    """
    return tune_many(capture, [Tuning(carrier_hz, channel, wide_half_band_hz)],
                     progress=progress)[0]


def tune_many(capture: Capture, tunings: list[Tuning], *, progress=None) -> list[Baseband]:
    """:func:`tune` for several carriers at once, reading the capture once.

    Each carrier has its own oscillator and decimation chain; they share the reading.
    """
    nyquist = capture.rate_hz / 2
    converters = []
    for tn in tunings:
        rel_hz = tn.carrier_hz - capture.center_hz
        if not np.isfinite(rel_hz) or (capture.is_complex and abs(rel_hz) >= nyquist) or (
                not capture.is_complex and not 0 < rel_hz < nyquist):
            span = (f"{capture.center_hz - nyquist:g} to {capture.center_hz + nyquist:g} Hz"
                    if capture.is_complex else f"0 to {nyquist:g} Hz")
            raise ParameterError(capture.source, f"carrier {tn.carrier_hz:g} Hz is outside "
                                 "the recorded band", expected=span)
        if not 0 <= tn.channel < capture.n_channels:
            raise ParameterError(capture.source, f"channel {tn.channel} does not exist",
                                 expected=f"0 to {capture.n_channels - 1}")
        wide = tn.wide_half_band_hz
        if wide is not None:
            wide = min(wide, 0.4 * capture.rate_hz)
        converters.append(Downconverter(rate_hz=capture.rate_hz, carrier_hz=rel_hz,
                                        is_complex=capture.is_complex,
                                        wide_half_band_hz=wide))
    parts = [[] for _ in tunings]
    power_parts = [[] for _ in tunings]
    for block in capture.blocks():
        for k, (tn, dc) in enumerate(zip(tunings, converters, strict=True)):
            parts[k].append(dc.process(block[:, tn.channel]))
            power_parts[k].append(dc.take_power())
        if progress is not None:
            progress(block.shape[0])
    out = []
    for k, (tn, dc) in enumerate(zip(tunings, converters, strict=True)):
        parts[k].append(dc.flush())
        power_parts[k].append(dc.take_power())
        samples = np.concatenate(parts[k])
        n_keep = max(int(math.ceil((capture.duration_s - dc.start_s) * dc.out_rate_hz)), 0)
        power = spark = None
        if dc.power_bandwidth_hz is not None:
            power = np.concatenate(power_parts[k])[:n_keep]
            pulses = dc.pulse_spectrum()
            spark = spark_rate_hz(*pulses) if pulses is not None else None
        out.append(Baseband(samples=samples[:n_keep], rate_hz=dc.out_rate_hz,
                            start_s=dc.start_s, carrier_hz=float(tn.carrier_hz),
                            channel=tn.channel, duration_s=capture.duration_s,
                            half_band_hz=BASEBAND_HALF_BAND_HZ, power=power,
                            power_bandwidth_hz=dc.power_bandwidth_hz, spark_rate_hz=spark))
    return out


def fine_offset_hz(baseband: Baseband, *, max_offset_hz: float) -> float:
    """Residual carrier offset in a baseband, from a fine Welch spectrum, Hz.

    The keyed carrier's mean spectrum peaks at its frequency; the peak within
    ``±max_offset_hz`` is interpolated on log power [1]_.
    """
    from scipy import signal

    z = baseband.samples
    nper = int(min(z.size, 2 ** math.ceil(math.log2(baseband.rate_hz * 1.0))))
    if nper < 32:
        return 0.0
    f, p = signal.welch(z, fs=baseband.rate_hz, nperseg=nper, return_onesided=False,
                        detrend=False)
    f, p = np.fft.fftshift(f), np.fft.fftshift(p)
    inside = np.abs(f) <= max_offset_hz
    if not inside.any():
        return 0.0
    idx = np.flatnonzero(inside)
    b = int(idx[np.argmax(p[idx])])
    return float(f[b] + _peak_offset(p, b) * (f[1] - f[0]))


def shift(baseband: Baseband, offset_hz: float) -> Baseband:
    """The same baseband with ``offset_hz`` moved to 0 Hz."""
    if offset_hz == 0.0:
        return baseband
    n = np.arange(baseband.samples.size)
    phase = np.mod(2 * np.pi * offset_hz * (baseband.start_s + n / baseband.rate_hz), 2 * np.pi)
    lo = np.empty(n.size, dtype=np.complex64)
    lo.real, lo.imag = np.cos(phase), -np.sin(phase)
    return replace(baseband, samples=baseband.samples * lo,
                   carrier_hz=baseband.carrier_hz + offset_hz)


# ---------------------------------------------------------------------------------------
# The envelope


@dataclass(frozen=True)
class Envelope:
    """Magnitude of the baseband after a moving-average (matched) filter."""

    magnitude: np.ndarray  # shape (n,), float64, full-scale amplitude units
    rate_hz: float
    start_s: float  # time of magnitude[0], s, the filter's delay removed
    filter_s: float  # length of the moving average, s
    noise_bandwidth_hz: float  # equivalent noise bandwidth of the whole chain, Hz
    carrier_hz: float
    source: str
    # noise alone, per sample: the Rayleigh parameter the magnitude would have, measured
    # in the flat passband away from the carrier (see noise_density); None if unknown
    noise_sigma: np.ndarray | None = field(default=None, repr=False)

    @property
    def time_s(self) -> np.ndarray:
        """Time of each sample, s."""
        return self.start_s + np.arange(self.magnitude.size) / self.rate_hz


def moving_average(z: np.ndarray, n: int, *, step: int = 1) -> np.ndarray:
    """Centred moving average of n samples, every step-th output (the ends see fewer).

    Output k is the mean of ``z[k*step - n//2 : k*step - n//2 + n]`` (clipped to the
    array), so output k stands at input sample ``k * step``.
    """
    dtype = np.complex128 if np.iscomplexobj(z) else np.float64
    if n <= 1:
        return z[::step].astype(dtype)
    c = np.zeros(z.size + 1, dtype=dtype)
    np.cumsum(z, out=c[1:])
    # c padded with its end values: c_pad[j] = c[clip(j - n // 2, 0, size)]
    c = np.pad(c, (n // 2, n - n // 2), mode="edge")
    m = -(-z.size // step)
    return (c[n :: step][:m] - c[::step][:m]) / n


def noise_bandwidth_hz(n: int, rate_hz: float) -> float:
    """Equivalent noise bandwidth of an n-sample moving average, Hz: rate / n.

    For a filter normalised to unity gain at 0 Hz, the noise power it passes from a
    white complex input of density N0 is N0 * B with B = rate * sum(h**2) (common
    practice); for h = 1/n that is rate / n.
    """
    return rate_hz / max(n, 1)


#: The envelope keeps at least this many samples per moving-average length.
ENVELOPE_SAMPLES_PER_FILTER = 8
#: Offsets from the carrier where noise_density measures the noise, Hz.
NOISE_BAND_HZ = (100.0, 0.9 * BASEBAND_HALF_BAND_HZ)


def noise_density(baseband: Baseband, *, smooth_s: float = 2.0) -> np.ndarray:
    """Two-sided noise density of a baseband at each sample, full scale² per Hz.

    The band ``100 Hz < |f| < 225 Hz`` around the carrier lies inside the decimation
    chain's flat passband and outside the keying sidebands (those of a 50 WPM dot fall
    by 1/f² past 42 Hz), so its mean power over a moving window of ``smooth_s``,
    divided by its noise bandwidth, measures the noise density whatever the keying.
    Strong signals raise it by their sidebands, which only errs on the safe side.
    """
    from scipy import signal

    z = baseband.samples
    rate = baseband.rate_hz
    lo, hi = NOISE_BAND_HZ
    hi = min(hi, 0.45 * rate)
    if z.size < 16 or hi <= lo:
        return np.zeros(z.size)
    # a real band-pass passes both sides of the carrier at once
    taps = signal.firwin(129, [lo, hi], pass_zero=False, fs=rate)
    y = signal.oaconvolve(z, taps.astype(np.float32), mode="same")
    power = (y.real.astype(np.float64) ** 2 + y.imag.astype(np.float64) ** 2)
    bw_hz = rate * float(np.sum(taps**2))  # two-sided noise bandwidth of the band-pass
    k = max(1, int(round(smooth_s * rate)))
    return moving_average(power, k).real / bw_hz


def envelope(baseband: Baseband, *, filter_s: float, source: str = "",
             density: np.ndarray | None = None) -> Envelope:
    """Matched envelope: moving average over ``filter_s`` then magnitude.

    Parameters
    ----------
    baseband : Baseband
    filter_s : float
        Length of the moving average, s. For a mark of length T, the filter matched to
        it is a moving average of length T (the matched filter for a rectangular pulse);
        shorter keeps the edges sharper at some loss of SNR.
    density : ndarray, optional
        :func:`noise_density` of this baseband, when already computed.

    Returns
    -------
    Envelope
        At the baseband rate divided by an integer that leaves at least eight samples
        per filter length; noise bandwidth ``rate / n`` for n baseband samples.
    """
    n = max(1, int(round(filter_s * baseband.rate_hz)))
    # eight samples per filter length are plenty: the moving average passes little
    # above 1 / filter_s, and its ramps are straight between samples
    step = max(1, n // ENVELOPE_SAMPLES_PER_FILTER)
    if baseband.power is not None:
        return _power_envelope(baseband, n, step, source)
    y = moving_average(baseband.samples, n, step=step)
    bw_hz = noise_bandwidth_hz(n, baseband.rate_hz)
    if density is None:
        density = noise_density(baseband)
    # complex noise of variance N0 * B has a Rayleigh magnitude with sigma² = N0 B / 2
    sigma = np.sqrt(density[::step] * bw_hz / 2.0)
    return Envelope(magnitude=np.abs(y), rate_hz=baseband.rate_hz / step,
                    start_s=baseband.start_s, filter_s=n / baseband.rate_hz,
                    noise_bandwidth_hz=bw_hz, carrier_hz=baseband.carrier_hz, source=source,
                    noise_sigma=sigma)


def _power_envelope(baseband: Baseband, n: int, step: int, source: str) -> Envelope:
    """Envelope of a pulsed carrier: the moving average of its band's power.

    The bursts of a spark transmitter have random phases, so they add in power, not in
    amplitude; averaging the power over the filter length bridges the gaps between
    bursts, and its ramps are straight, so a threshold halfway up keeps the marks'
    length. Noise alone gives a nearly constant level here (many independent samples
    averaged), taken from the 10 % quantile of the envelope (key-up fills more than a
    third of any Morse transmission) and given as the ``sigma`` whose Rayleigh mean it
    is, for the next stage's floor.
    """
    magnitude = np.maximum(moving_average(baseband.power, n, step=step).real, 0.0)
    floor = float(np.quantile(magnitude, 0.1)) if magnitude.size else 0.0
    sigma = np.full(magnitude.size, floor / math.sqrt(math.pi / 2.0))
    return Envelope(magnitude=magnitude, rate_hz=baseband.rate_hz / step,
                    start_s=baseband.start_s, filter_s=n / baseband.rate_hz,
                    noise_bandwidth_hz=float(baseband.power_bandwidth_hz or 0.0),
                    carrier_hz=baseband.carrier_hz, source=source, noise_sigma=sigma)


# ---------------------------------------------------------------------------------------
# Drift


#: Frames of the drift tracker, s: fine enough in frequency (2 Hz), short enough to
#: follow a drift of tens of hertz over a message.
DRIFT_FRAME_S = 0.5
#: Largest change of frequency between tracked frames, Hz per s.
DRIFT_SLEW_HZ_PER_S = 40.0
#: A drift smaller than this everywhere is left alone, Hz: the line of a half-second
#: frame, half filled by slow keying, wanders by a few hertz on its own.
DRIFT_MIN_HZ = 6.0
#: A frame shows the carrier when its line stands this far above the frame's median
#: bin: 15 dB, which noise alone (exponential power, median ln 2 of the mean) passes
#: with a probability of 1e-9 per bin.
DRIFT_LINE_OVER_MEDIAN = 30.0


def drift_track_hz(baseband: Baseband, *, max_offset_hz: float = 150.0) -> np.ndarray | None:
    """The carrier's frequency over time, when it drifts, or None when it holds still.

    Parameters
    ----------
    baseband : Baseband
        Carrier near 0 Hz.
    max_offset_hz : float
        How far from 0 Hz the carrier may wander, Hz.

    Returns
    -------
    ndarray, shape (n,), or None
        Frequency at each baseband sample, Hz; None when the drift stays under
        ``DRIFT_MIN_HZ`` or too few frames show the carrier.

    Notes
    -----
    Short-time spectra of ``DRIFT_FRAME_S`` (Hann, not overlapping, zero-padded twice)
    give each frame's strongest line within ``±max_offset_hz``; frames whose line
    stands less than 15 dB above the frame's median bin are skipped (spaces, pauses).
    From the strongest frame the track grows both ways, each frame taking its strongest
    line within the slew allowed since the last accepted one (so a neighbouring
    station cannot capture it), and a running median of seven accepted frames smooths
    it before it is interpolated to every sample.
    """
    from scipy import signal

    z = baseband.samples
    rate = baseband.rate_hz
    nper = int(DRIFT_FRAME_S * rate)
    if z.size < 4 * nper:
        return None
    f, t, spec = signal.stft(z, fs=rate, nperseg=nper, noverlap=0, nfft=2 * nper,
                             return_onesided=False, boundary=None, padded=False)
    f = np.fft.fftshift(f)
    band = np.abs(f) <= max_offset_hz
    spec = np.fft.fftshift(spec, axes=0)[band]
    f, power = f[band], spec.real**2 + spec.imag**2
    floor = np.median(power, axis=0)
    peak = np.argmax(power, axis=0)
    strong = power[peak, np.arange(t.size)] > DRIFT_LINE_OVER_MEDIAN * floor
    if strong.sum() < 3:
        return None
    hop_s = t[1] - t[0]
    track = np.full(t.size, np.nan)
    first = int(np.argmax(np.where(strong, power[peak, np.arange(t.size)], 0.0)))
    track[first] = f[peak[first]]
    # only frames whose strongest line is clear of the noise can take a line at all
    frames = np.flatnonzero(strong)
    df = f[1] - f[0]
    for direction in (1, -1):
        last_k, last_f = first, track[first]
        for k in (frames[frames > first] if direction > 0 else frames[frames < first][::-1]):
            reach = min(DRIFT_SLEW_HZ_PER_S * hop_s * abs(k - last_k), 30.0) + 2.0
            lo = max(0, int(np.searchsorted(f, last_f - reach - 0.5 * df)))
            hi = int(np.searchsorted(f, last_f + reach + 0.5 * df))
            if hi <= lo:
                continue
            j = lo + int(np.argmax(power[lo:hi, k]))
            if power[j, k] > DRIFT_LINE_OVER_MEDIAN * floor[k]:
                track[k] = f[j]
                last_k, last_f = k, f[j]
    ok = np.flatnonzero(~np.isnan(track))
    if ok.size < 3:
        return None
    smooth = np.median(np.lib.stride_tricks.sliding_window_view(
        np.pad(track[ok], 3, mode="edge"), 7), axis=1)
    if np.max(np.abs(smooth - np.median(smooth))) < DRIFT_MIN_HZ:
        return None
    times = baseband.start_s + np.arange(z.size) / rate
    return np.interp(times, baseband.start_s + t[ok], smooth)


def follow(baseband: Baseband, track_hz: np.ndarray) -> Baseband:
    """The baseband with a drifting carrier held at 0 Hz (phase of the track removed)."""
    phase = 2 * np.pi * np.cumsum(track_hz) / baseband.rate_hz
    lo = np.empty(phase.size, dtype=np.complex64)
    lo.real, lo.imag = np.cos(phase), -np.sin(phase)
    mean_hz = float(np.mean(track_hz))
    return replace(baseband, samples=baseband.samples * lo,
                   carrier_hz=baseband.carrier_hz + mean_hz)
