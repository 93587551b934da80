"""Stage 5: the stages' results -> Reception: C/N0, SNR, levels, timing, the JSON contract.

C/N0 and SNR
------------
The baseband is filtered with a moving average of ``n`` samples (half a dot, at most
20 ms) followed by a short low-pass that removes the moving average's far sidelobes,
so the noise it passes lies inside the flat passband of the decimation chain and of
any receiver filter of 200 Hz or more. Its
equivalent noise bandwidth is ``B = rate * sum(h**2) / sum(h)**2`` (two-sided, for the
complex baseband). Over the interiors of the marks the mean power is ``S + N`` and over
the interiors of the spaces it is ``N``; then

    C/N0 = (P_mark - P_space) / P_space * B      [Hz],

which is the carrier power over the one-sided noise density for real audio (where
mixing halves both) and for I/Q alike. ``snr_db`` is ``C/N0 - 10 log10(B_det)`` in the
detection bandwidth ``B_det``, the noise bandwidth of the envelope's matched filter,
reported as ``snr_bandwidth_hz``.

Levels in dBFS refer to a full-scale sine (real captures) or a full-scale complex
exponential (I/Q) at 0 dBFS.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .baseband import Baseband, Envelope
from .marks import Marks
from .symbols import CHARACTER, ELEMENT, WORD, Symbols
from .text import Character, Decoded


@dataclass(frozen=True)
class Timing:
    """Keying timing in ms (the JSON contract's units)."""

    dot_ms: float | None
    dash_ms: float | None
    dot_spread_ms: float | None  # standard deviation of dot lengths
    dash_spread_ms: float | None
    dash_dot_ratio: float | None
    element_gap_ms: float | None
    char_gap_ms: float | None
    word_gap_ms: float | None
    jitter_ms: float | None  # pooled spread of dots, dashes and element gaps
    unit_ms: float | None  # the speed's unit, 1200 / wpm

    def to_dict(self) -> dict:
        return {k: _round(v, 2) for k, v in self.__dict__.items()}


@dataclass(frozen=True)
class Level:
    """Strength figures of a reception."""

    cn0_dbhz: float | None
    snr_db: float | None
    snr_bandwidth_hz: float | None
    signal_dbfs: float | None
    noise_dbfs: float | None  # in snr_bandwidth_hz


@dataclass(frozen=True)
class Reception:
    """Everything okdecode learnt from one recording."""

    file: str
    text: str
    carrier_hz: float | None
    wpm: float | None
    farnsworth_wpm: float | None
    level: Level
    duration_s: float
    timing: Timing
    characters: tuple[Character, ...]
    n_unknown: int
    channel: int | None
    rate_hz: float
    decoder: str
    warnings: tuple[str, ...]
    notes: tuple[str, ...] = ()
    extra: dict = field(default_factory=dict)  # other stages' figures (spark rate, ...)
    # the intermediate results, for plots and later stages; not in the JSON
    envelope: Envelope | None = field(default=None, repr=False, compare=False)
    marks: Marks | None = field(default=None, repr=False, compare=False)
    symbols: Symbols | None = field(default=None, repr=False, compare=False)
    spectrum: object | None = field(default=None, repr=False, compare=False)
    baseband: Baseband | None = field(default=None, repr=False, compare=False)

    @property
    def cn0_dbhz(self) -> float | None:
        return self.level.cn0_dbhz

    @property
    def snr_db(self) -> float | None:
        return self.level.snr_db

    def to_dict(self) -> dict:
        """The JSON contract: every key always present, ``None`` where not measured."""
        out = {
            "file": self.file,
            "text": self.text,
            "carrier_hz": _round(self.carrier_hz, 2),
            "wpm": _round(self.wpm, 2),
            "farnsworth_wpm": _round(self.farnsworth_wpm, 2),
            "cn0_dbhz": _round(self.level.cn0_dbhz, 2),
            "snr_db": _round(self.level.snr_db, 2),
            "snr_bandwidth_hz": _round(self.level.snr_bandwidth_hz, 2),
            "signal_dbfs": _round(self.level.signal_dbfs, 2),
            "noise_dbfs": _round(self.level.noise_dbfs, 2),
            "duration_s": _round(self.duration_s, 4),
            "channel": self.channel,
            "rate_hz": self.rate_hz,
            "decoder": self.decoder,
            "n_unknown": self.n_unknown,
            "timing": self.timing.to_dict(),
            "characters": [
                {"char": c.char, "pattern": c.pattern, "start_s": round(c.start_s, 4),
                 "end_s": round(c.end_s, 4), "confidence": round(c.confidence, 3)}
                for c in self.characters
            ],
            "warnings": list(self.warnings),
            "notes": list(self.notes),
        }
        out.update(self.extra)
        return out


def _round(v: float | None, nd: int) -> float | None:
    if v is None or not math.isfinite(v):
        return None
    return round(float(v), nd)


def _mean_std(v: np.ndarray) -> tuple[float | None, float | None]:
    if v.size == 0:
        return None, None
    return float(v.mean()), float(v.std(ddof=1)) if v.size > 1 else None


def timing(symbols: Symbols) -> Timing:
    """Timing statistics of classified marks and spaces, ms."""
    if symbols.n_marks == 0 or symbols.dot_s is None:
        return Timing(*([None] * 10))
    m = (symbols.end_s - symbols.start_s) * 1e3
    g = (symbols.start_s[1:] - symbols.end_s[:-1]) * 1e3
    dots, dashes = m[~symbols.is_dash], m[symbols.is_dash]
    elem = g[symbols.gap_class == ELEMENT]
    chars = g[symbols.gap_class == CHARACTER]
    words = g[symbols.gap_class == WORD]
    words = words[words < 20 * symbols.dot_s * 1e3]  # pauses are not word gaps
    dot_mean, dot_sd = _mean_std(dots)
    dash_mean, dash_sd = _mean_std(dashes)
    elem_mean, _ = _mean_std(elem)
    resid = [v - v.mean() for v in (dots, dashes, elem) if v.size > 1]
    n_resid = sum(r.size for r in resid)
    jitter = (float(np.sqrt(sum(float((r**2).sum()) for r in resid) / (n_resid - len(resid))))
              if n_resid > len(resid) else None)
    ratio = dash_mean / dot_mean if dot_mean and dash_mean else symbols.dash_dot_ratio
    return Timing(dot_ms=dot_mean, dash_ms=dash_mean, dot_spread_ms=dot_sd,
                  dash_spread_ms=dash_sd, dash_dot_ratio=ratio, element_gap_ms=elem_mean,
                  char_gap_ms=_mean_std(chars)[0], word_gap_ms=_mean_std(words)[0],
                  jitter_ms=jitter, unit_ms=symbols.dot_s * 1e3)


def measurement_filter(rate_hz: float, dot_s: float) -> np.ndarray:
    """Moving average of half a dot (at most 20 ms) tamed by a short low-pass.

    About 50 to 100 Hz wide: narrow enough that a receiver's own audio filter (rarely
    under 200 Hz) is flat across it, so the noise it measures is the noise at the
    carrier.
    """
    from scipy import signal

    n = max(1, int(round(min(0.5 * dot_s, 0.020) * rate_hz)))
    lp = signal.firwin(15, min(100.0, 0.3 * rate_hz), fs=rate_hz)
    h = np.convolve(np.ones(n) / n, lp)
    return h / h.sum()


def interiors(start_s: np.ndarray, end_s: np.ndarray, time_s: np.ndarray,
              guard_s: float) -> np.ndarray:
    """Boolean mask of samples at least guard_s inside any [start, end] interval."""
    mask = np.zeros(time_s.size, dtype=bool)
    lo = np.searchsorted(time_s, start_s + guard_s)
    hi = np.searchsorted(time_s, end_s - guard_s)
    ok = hi > lo
    if ok.any():
        delta = np.zeros(time_s.size + 1, dtype=np.int32)
        np.add.at(delta, lo[ok], 1)
        np.add.at(delta, hi[ok], -1)
        mask = np.cumsum(delta[:-1]) > 0
    return mask


def measure(baseband: Baseband, marks: Marks, *, dot_s: float, detection_bandwidth_hz: float,
            is_complex: bool) -> Level:
    """C/N0, SNR and levels from the powers inside marks and spaces (module notes)."""
    from scipy import signal

    none = Level(None, None, detection_bandwidth_hz, None, None)
    if marks.n_marks == 0 or baseband.samples.size < 32:
        return none
    rate = baseband.rate_hz
    h = measurement_filter(rate, dot_s)
    # a few samples per quarter dot are enough for means over mark and space interiors
    step = max(1, int(0.25 * dot_s * rate) // 4)
    if baseband.power is not None and baseband.power_bandwidth_hz:
        # a pulsed carrier: its whole band's power, in the band's noise bandwidth
        bw_hz = baseband.power_bandwidth_hz
        p = signal.oaconvolve(baseband.power.astype(np.float64), h, mode="same")[::step]
    else:
        bw_hz = rate * float(np.sum(h**2))
        y = signal.oaconvolve(baseband.samples, h.astype(np.float32), mode="same")[::step]
        p = y.real.astype(np.float64) ** 2 + y.imag.astype(np.float64) ** 2
    t = baseband.start_s + np.arange(p.size) * (step / rate)
    guard = 0.5 * h.size / rate + 0.002
    on = interiors(marks.start_s, marks.end_s, t, guard)
    gap_start = np.concatenate([[t[0] - 1.0], marks.end_s])
    gap_end = np.concatenate([marks.start_s, [t[-1] + 1.0]])
    off = interiors(gap_start, gap_end, t, guard)
    # the first and last samples saw the filter's zero padding
    edge = -(-h.size // step)
    on[:edge] = on[-edge:] = off[:edge] = off[-edge:] = False
    if on.sum() < 4 or off.sum() < 16:
        return none
    p_on, p_off = float(p[on].mean()), float(p[off].mean())
    s = p_on - p_off
    if s <= 0 or p_off <= 0:
        return none
    cn0 = 10 * math.log10(s / p_off * bw_hz)
    snr = cn0 - 10 * math.log10(detection_bandwidth_hz)
    signal_dbfs = 10 * math.log10(s * (1.0 if is_complex else 4.0))
    return Level(cn0_dbhz=cn0, snr_db=snr, snr_bandwidth_hz=detection_bandwidth_hz,
                 signal_dbfs=signal_dbfs, noise_dbfs=signal_dbfs - snr)


def assemble(*, file: str, decoded: Decoded, symbols: Symbols, marks: Marks,
             envelope: Envelope, baseband: Baseband, level: Level, duration_s: float,
             rate_hz: float, channel: int, decoder: str, warnings: list[str],
             notes: list[str], spectrum: object = None, extra: dict | None = None) -> Reception:
    """Put the stages' results together into a Reception."""
    wpm = symbols.wpm
    return Reception(file=file, text=decoded.text, carrier_hz=baseband.carrier_hz, wpm=wpm,
                     farnsworth_wpm=symbols.farnsworth_wpm, level=level,
                     duration_s=duration_s, timing=timing(symbols),
                     characters=decoded.characters, n_unknown=decoded.n_unknown,
                     channel=channel, rate_hz=rate_hz, decoder=decoder,
                     warnings=tuple(warnings), notes=tuple(notes), extra=dict(extra or {}),
                     envelope=envelope, marks=marks, symbols=symbols, spectrum=spectrum,
                     baseband=baseband)


def empty(*, file: str, duration_s: float, rate_hz: float, channel: int | None,
          decoder: str, warnings: list[str], notes: list[str], spectrum: object = None,
          carrier_hz: float | None = None, baseband: Baseband | None = None,
          envelope: Envelope | None = None, marks: Marks | None = None,
          extra: dict | None = None) -> Reception:
    """A Reception with nothing decoded."""
    return Reception(file=file, text="", carrier_hz=carrier_hz, wpm=None, farnsworth_wpm=None,
                     level=Level(None, None, None, None, None), duration_s=duration_s,
                     timing=Timing(*([None] * 10)), characters=(), n_unknown=0,
                     channel=channel, rate_hz=rate_hz, decoder=decoder,
                     warnings=tuple(warnings), notes=tuple(notes), spectrum=spectrum,
                     baseband=baseband, envelope=envelope, marks=marks,
                     extra={"spark_rate_hz": None, "ringing_hz": None, "drift_hz": None,
                            **(extra or {})})
