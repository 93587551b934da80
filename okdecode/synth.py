"""Signal generator: keyed recordings whose truth is known, for tests, benchmarks and demos.

A :class:`Scenario` says what is on the air and in the receiver: the message and its timing
(speed, Farnsworth spacing, dash/dot ratio, weighting, jitter, a speed glide), the carrier
(frequency, drift, fading, drop-outs), other stations (steady carriers or second messages),
hum, DC, impulse noise, a receiver's AGC, and white noise set by C/N0. :class:`Synthesizer`
renders it block by block with bounded memory; :func:`synth` returns the whole recording
in memory and :func:`synth_file` streams it to WAV, FLAC, OGG or ``.npy``. Each result
carries its :class:`Truth`: every mark and character with its times, the amplitude and the
noise level, against which a receiver is scored.

Built on :mod:`okdecode.text`; no stage imports this module.
"""

from __future__ import annotations

import math
import numbers
import operator
import sys
import types
from dataclasses import KW_ONLY, dataclass
from pathlib import Path

import numpy as np

from .errors import ParameterError
from .text import canonical, encode, runs, tokens

__all__ = [
    "Keying",
    "Recording",
    "Scenario",
    "Station",
    "Synthesizer",
    "Truth",
    "key",
    "synth",
    "synth_file",
]

#: Source named in the messages of errors that concern no file.
SOURCE = "<synth>"

#: Largest sample magnitude (per component) aimed at when the amplitude is chosen automatically.
PEAK = 0.9

# Noise peaks allowed for when the amplitude is chosen automatically, in standard deviations
# of one component: a Gaussian passes 6.5 sigma with probability 8e-11 per sample, so an hour
# at 48 kHz (1.7e8 samples) clips with odds of about 1 in 70.
_NOISE_PEAK_SIGMA = 6.5

# Hum: the mains fundamental and its harmonics up to the fifth, amplitude 1/k for the k-th,
# a buzz of our own choosing (rectifier and transformer hum is rich in harmonics; common
# practice).
_HUM_HARMONICS = 5

# Labels of okdecode's random streams (SeedSequence spawn keys): each part of a scenario
# draws from its own stream, so that adding a station or clicks leaves the noise as it was.
_NOISE, _CLICK_TIMES, _CLICK_WAVE, _FADING, _MAIN_KEYING, _STATION_KEYING = range(6)


def _require(ok: bool, source: str, problem: str, expected: str) -> None:
    if not ok:
        raise ParameterError(source, problem, expected=expected)


def _finite(value: object) -> bool:
    return isinstance(value, numbers.Real) and not isinstance(value, bool) and math.isfinite(value)


def _check_timing(
    source: str,
    *,
    wpm: float,
    char_wpm: float | None,
    wpm_end: float | None,
    dash_dot_ratio: float,
    weight: float,
    jitter: float,
) -> None:
    _require(_finite(wpm) and wpm > 0, source, f"wpm is {wpm!r}", "a finite speed > 0")
    _require(
        char_wpm is None or (_finite(char_wpm) and char_wpm >= wpm),
        source,
        f"char_wpm is {char_wpm!r} with wpm {wpm!r}",
        "a character speed at least the overall speed (Farnsworth spacing), or None",
    )
    _require(
        wpm_end is None or (_finite(wpm_end) and wpm_end > 0),
        source,
        f"wpm_end is {wpm_end!r}",
        "a finite speed > 0, or None for a steady speed",
    )
    _require(
        _finite(dash_dot_ratio) and dash_dot_ratio > 1,
        source,
        f"dash_dot_ratio is {dash_dot_ratio!r}",
        "a finite ratio > 1 (3 by ITU-R M.1677-1)",
    )
    _require(
        _finite(weight) and abs(weight) < 0.5,
        source,
        f"weight is {weight!r}",
        "a fraction of a dot between -0.5 and 0.5",
    )
    _require(
        _finite(jitter) and 0 <= jitter <= 0.3,
        source,
        f"jitter is {jitter!r}",
        "a fraction between 0 and 0.3",
    )


@dataclass(frozen=True)
class Keying:
    """What one transmitter sent: its marks and characters, with their times.

    Times are those of the half-amplitude points of the keying edges, in seconds from the
    start of the recording.
    """

    text: str  # the message as decoding spells it (okdecode.text.canonical)
    start_s: np.ndarray  # shape (n_marks,), leading edge of each mark, sorted
    end_s: np.ndarray  # shape (n_marks,), trailing edge, end_s > start_s
    units: np.ndarray  # shape (n_marks,), int, 1 for a dot and 3 for a dash
    chars: tuple[str, ...]  # each character or procedural signal, word breaks left out
    char_start_s: np.ndarray  # shape (n_chars,), leading edge of each character's first mark
    char_end_s: np.ndarray  # shape (n_chars,), trailing edge of its last mark
    wpm: float  # overall speed at the start, words per minute by the word PARIS
    char_wpm: float  # character speed at the start; equals wpm without Farnsworth spacing
    wpm_end: float  # overall speed at the end; equals wpm without a glide
    dot_s: float  # nominal dot at the start, 1.2 / char_wpm

    @property
    def n_marks(self) -> int:
        """Number of marks (key-down intervals)."""
        return int(self.start_s.size)


def key(
    message: str,
    *,
    wpm: float = 20.0,
    char_wpm: float | None = None,
    wpm_end: float | None = None,
    dash_dot_ratio: float = 3.0,
    weight: float = 0.0,
    jitter: float = 0.0,
    start_s: float = 0.0,
    seed: int | np.random.SeedSequence = 0,
    source: str = SOURCE,
) -> Keying:
    """Times of the marks of a message, as a key would send them.

    Parameters
    ----------
    message : str
        Text with characters of ITU-R M.1677-1 and procedural signals such as ``<AR>``;
        case and runs of white space do not matter.
    wpm : float
        Overall speed, words per minute by the standard word PARIS.
    char_wpm : float or None
        Character speed for Farnsworth spacing, at least ``wpm``; None sends the characters
        at ``wpm`` with standard gaps.
    wpm_end : float or None
        Overall speed at the end of the message; the speed (and the character speed with it)
        moves linearly from ``wpm`` to ``wpm_end`` with the share of the message's nominal
        units already sent. None keeps the speed steady.
    dash_dot_ratio : float
        Dash length in dots, > 1.
    weight : float
        Fraction of a dot added to every mark and taken from the gap after it (heavy
        keying when > 0, light when < 0), so that the speed stays as it was.
    jitter : float
        Relative standard deviation of every mark and gap length, 0 to 0.3. The Gaussian
        draws are limited to 3 standard deviations.
    start_s : float
        Leading edge of the first mark, s.
    seed : int or numpy.random.SeedSequence
        Seed of the jitter.
    source : str
        Named at the start of error messages.

    Returns
    -------
    Keying
        The marks and characters; every length is at least half a dot.

    Raises
    ------
    ParameterError
        If an option is out of range or a character has no signal.

    Notes
    -----
    A dot is ``dot_s = 1.2 / char_wpm`` long: speed counts the word "PARIS", 50 units with
    its word gap (common practice). A dash is 3 units, the gaps are 1 unit inside a
    character, 3 between characters and 7 between words [1]_. With Farnsworth spacing the
    characters keep the timing of ``char_wpm`` and only the gaps between characters and
    words stretch, to ``3 t`` and ``7 t`` with ``t = (60 / wpm - 37.2 / char_wpm) / 19``,
    so that PARIS still takes ``60 / wpm`` seconds: its characters span 31 units and its
    gaps 19 [2]_. A ``dash_dot_ratio`` other than 3 changes the length of PARIS; ``wpm``
    then sets the dot and the gaps alone.

    References
    ----------
    .. [1] ITU-R Recommendation M.1677-1, "International Morse code", 2009.
    .. [2] J. Bloom, "A standard for Morse timing using the Farnsworth technique", QEX,
       April 1990.

    Examples
    --------
    >>> k = key("PARIS PARIS", wpm=20)
    >>> round(k.dot_s, 6), k.chars[:3], k.n_marks
    (0.06, ('P', 'A', 'R'), 28)
    >>> round(float(k.end_s[-1] + 7 * k.dot_s), 6)  # two words of 50 units at 20 WPM
    6.0
    """
    _check_timing(
        source,
        wpm=wpm,
        char_wpm=char_wpm,
        wpm_end=wpm_end,
        dash_dot_ratio=dash_dot_ratio,
        weight=weight,
        jitter=jitter,
    )
    _require(_finite(start_s), source, f"start_s is {start_s!r}", "a finite time, s")
    elements = runs(message, source=source)
    chars = tuple(tok for tok in tokens(message) if tok != " ")
    char_wpm = wpm if char_wpm is None else char_wpm
    wpm_end = wpm if wpm_end is None else wpm_end
    text = canonical(message)
    if not elements:
        empty = np.empty(0)
        return Keying(text, empty, empty, np.empty(0, dtype=int), chars, empty, empty,
                      wpm, char_wpm, wpm_end, 1.2 / char_wpm)  # fmt: skip

    down = np.array([r.key_down for r in elements])
    units = np.array([r.units for r in elements])
    sent = np.cumsum(units) - units
    speed = 1.0 + (wpm_end / wpm - 1.0) * sent / units.sum()  # glide factor, 1 when steady
    dot_s = 1.2 / (char_wpm * speed)
    gap_unit_s = (60.0 / wpm - 37.2 / char_wpm) / 19.0 / speed  # Bloom (QEX 1990)
    length_s = np.where(
        down,
        np.where(units == 1, 1.0, dash_dot_ratio) * dot_s,
        np.where(units == 1, dot_s, units * gap_unit_s),
    )
    length_s += np.where(down, weight, -weight) * dot_s
    if jitter:
        draws = np.random.default_rng(seed).standard_normal(units.size)
        length_s *= 1.0 + jitter * np.clip(draws, -3.0, 3.0)
    length_s = np.maximum(length_s, 0.5 * dot_s)
    begin_s = start_s + np.concatenate(([0.0], np.cumsum(length_s)[:-1]))
    start = begin_s[down]
    end = start + length_s[down]
    # a gap of 3 or 7 units ends a character; count them to number each mark's character
    char_of_mark = np.cumsum((~down) & (units >= 3))[down]
    first = np.flatnonzero(np.diff(char_of_mark, prepend=-1))
    last = np.append(first[1:] - 1, char_of_mark.size - 1)
    return Keying(
        text=text,
        start_s=start,
        end_s=end,
        units=units[down],
        chars=chars,
        char_start_s=start[first],
        char_end_s=end[last],
        wpm=float(wpm),
        char_wpm=float(char_wpm),
        wpm_end=float(wpm_end),
        dot_s=1.2 / char_wpm,
    )


@dataclass(frozen=True)
class Station:
    """Another transmitter in the recording: a steady carrier, or a second keyed message.

    It shares the main station's edges (``rise_s``), dash/dot ratio and weighting, but not
    its fading, drift or drop-outs.
    """

    carrier_hz: float  # real audio: in (0, rate_hz / 2); I/Q: offset from the centre
    level_db: float = 0.0  # carrier amplitude re the main carrier's amplitude A, dB
    message: str | None = None  # None: a steady, unkeyed carrier through the whole recording
    wpm: float = 20.0
    char_wpm: float | None = None
    start_s: float = 0.5  # leading edge of its first mark, s from the start of the recording
    jitter: float = 0.0


@dataclass(frozen=True)
class Scenario:
    """Everything a synthetic recording is made of. All times in s, levels in dB.

    Levels of other parts are given in dB re the main carrier's amplitude A (``level_db``,
    ``hum_db``, ``dc_db``, ``click_db``); C/N0 sets the noise from A (see :func:`synth`).
    Keyword arguments of :func:`synth` and :func:`synth_file` are these fields.
    """

    message: str = ""  # ITU-R M.1677-1 characters and <XX> procedural signals; "" for none
    _: KW_ONLY
    rate_hz: float = 8000.0
    iq: bool = False  # complex baseband samples instead of real audio
    carrier_hz: float = 700.0  # main carrier; with iq, an offset from the centre
    cn0_dbhz: float | None = None  # carrier to noise density of the main carrier; None: no noise
    amplitude: float | None = None  # A in full-scale units; None: chosen so nothing clips
    # timing of the main message (see key)
    wpm: float = 20.0
    char_wpm: float | None = None
    wpm_end: float | None = None
    dash_dot_ratio: float = 3.0
    weight: float = 0.0
    jitter: float = 0.0
    rise_s: float = 0.005  # raised-cosine edge, 0 to full amplitude; at most half a dot
    # layout
    lead_s: float = 0.5  # leading edge of the first mark
    tail_s: float = 0.5  # after the last edge of any station
    duration_s: float | None = None  # at least this long (noise-only recordings need it)
    # channel: main carrier only
    fading_db: float = 0.0  # peak-to-trough depth of a slow fade, sinusoidal in dB
    fading_period_s: float = 8.0
    drift_hz: float = 0.0  # linear carrier drift from the first mark to the last
    dropouts_s: tuple[tuple[float, float], ...] = ()  # (start_s, length_s): carrier lost
    # other signals
    stations: tuple[Station, ...] = ()
    hum_hz: float = 50.0
    hum_db: float | None = None  # level of the hum's fundamental; None: no hum
    dc_db: float | None = None  # DC offset (on I in I/Q); None: none
    clicks_per_s: float = 0.0  # mean rate of impulse noise bursts (Poisson)
    click_db: float = 20.0  # peak amplitude of a burst
    click_length_s: float = 0.002
    # receiver
    agc_db: float = 0.0  # how far the AGC's gain rises in a long space; 0: no AGC
    agc_release_s: float = 0.3  # time constant of that rise
    seed: int = 0
    source: str = SOURCE  # named at the start of error messages

    def __post_init__(self) -> None:
        src = self.source
        object.__setattr__(self, "dropouts_s", tuple(tuple(d) for d in self.dropouts_s))
        object.__setattr__(self, "stations", tuple(self.stations))
        _require(isinstance(self.message, str), src, "message is not text", "a str")
        encode(self.message, source=src)
        _require(
            _finite(self.rate_hz) and self.rate_hz > 0,
            src,
            f"rate_hz is {self.rate_hz!r}",
            "a finite sample rate > 0, Hz",
        )
        _check_timing(
            src,
            wpm=self.wpm,
            char_wpm=self.char_wpm,
            wpm_end=self.wpm_end,
            dash_dot_ratio=self.dash_dot_ratio,
            weight=self.weight,
            jitter=self.jitter,
        )
        nyquist_hz = self.rate_hz / 2
        low_hz = -nyquist_hz if self.iq else 0.0
        band = f"a frequency in ({low_hz:g}, {nyquist_hz:g}) Hz"
        _require(_finite(self.drift_hz), src, f"drift_hz is {self.drift_hz!r}", "a finite Hz")
        for name, hz in (("carrier_hz", self.carrier_hz),
                         ("carrier_hz + drift_hz", self.carrier_hz + self.drift_hz)):  # fmt: skip
            _require(_finite(hz) and low_hz < hz < nyquist_hz, src, f"{name} is {hz!r}", band)
        _require(
            self.cn0_dbhz is None or _finite(self.cn0_dbhz),
            src,
            f"cn0_dbhz is {self.cn0_dbhz!r}",
            "a finite C/N0 in dB-Hz, or None for no noise",
        )
        _require(
            self.amplitude is None or (_finite(self.amplitude) and self.amplitude > 0),
            src,
            f"amplitude is {self.amplitude!r}",
            "a finite amplitude > 0 (full scale 1.0), or None",
        )
        for name in ("rise_s", "lead_s", "tail_s", "fading_db", "clicks_per_s", "agc_db"):
            value = getattr(self, name)
            _require(_finite(value) and value >= 0, src, f"{name} is {value!r}", "finite, >= 0")
        for name in ("fading_period_s", "hum_hz", "click_length_s", "agc_release_s"):
            value = getattr(self, name)
            _require(_finite(value) and value > 0, src, f"{name} is {value!r}", "finite, > 0")
        for name in ("hum_db", "dc_db", "click_db"):
            value = getattr(self, name)
            _require(value is None or _finite(value), src, f"{name} is {value!r}", "finite dB")
        _require(
            self.duration_s is None or (_finite(self.duration_s) and self.duration_s > 0),
            src,
            f"duration_s is {self.duration_s!r}",
            "a finite length > 0, s, or None",
        )
        for dropout in self.dropouts_s:
            _require(
                len(dropout) == 2 and all(map(_finite, dropout)) and dropout[1] > 0,
                src,
                f"dropout {dropout!r}",
                "pairs (start_s, length_s) with length_s > 0",
            )
        _require(
            isinstance(self.seed, numbers.Integral) and not isinstance(self.seed, bool)
            and self.seed >= 0,
            src,
            f"seed is {self.seed!r}",
            "an int >= 0",
        )
        glide = max(1.0, (self.wpm_end or self.wpm) / self.wpm)  # the fastest point
        half_dot_s = 0.6 / (self.char_wpm or self.wpm) / glide
        _require(
            self.rise_s <= half_dot_s,
            src,
            f"rise_s is {self.rise_s!r}, longer than half the shortest dot",
            f"at most {half_dot_s:.6g} s at this speed",
        )
        if self.message.strip():
            _require(
                self.lead_s >= self.rise_s / 2,
                src,
                f"lead_s is {self.lead_s!r}, shorter than half an edge",
                f"at least rise_s / 2 = {self.rise_s / 2:g} s",
            )
        for i, st in enumerate(self.stations):
            name = f"station {i}"
            _require(isinstance(st, Station), src, f"{name} is {st!r}", "a Station")
            _require(
                _finite(st.carrier_hz) and low_hz < st.carrier_hz < nyquist_hz,
                src,
                f"{name} carrier_hz is {st.carrier_hz!r}",
                band,
            )
            _require(_finite(st.level_db), src, f"{name} level_db is {st.level_db!r}", "finite dB")
            if st.message is None:
                continue
            _require(isinstance(st.message, str), src, f"{name} message is not text", "a str")
            encode(st.message, source=src)
            _check_timing(
                f"{src}: {name}",
                wpm=st.wpm,
                char_wpm=st.char_wpm,
                wpm_end=None,
                dash_dot_ratio=self.dash_dot_ratio,
                weight=self.weight,
                jitter=st.jitter,
            )
            st_half_dot_s = 0.6 / (st.char_wpm or st.wpm)
            _require(
                self.rise_s <= st_half_dot_s,
                src,
                f"rise_s is {self.rise_s!r}, longer than half of {name}'s dot",
                f"at most {st_half_dot_s:.6g} s",
            )
            _require(
                _finite(st.start_s) and st.start_s >= self.rise_s / 2,
                src,
                f"{name} start_s is {st.start_s!r}",
                f"a time of at least rise_s / 2 = {self.rise_s / 2:g} s",
            )


@dataclass(frozen=True)
class Truth:
    """What a synthetic recording holds, for scoring a receiver against it."""

    scenario: Scenario  # what was asked for
    keying: Keying  # the main message
    others: tuple[Keying | None, ...]  # one per scenario.stations; None for a steady carrier
    n_samples: int
    amplitude: float  # A, the main carrier's amplitude, full scale 1.0 (before fading and AGC)
    noise_rms: float  # sigma: sqrt(E|n|^2) over the whole band; 0.0 without noise
    click_start_s: np.ndarray  # shape (n_clicks,), start of each impulse noise burst

    @property
    def rate_hz(self) -> float:
        """Sample rate, Hz."""
        return self.scenario.rate_hz

    @property
    def text(self) -> str:
        """The main message as decoding spells it."""
        return self.keying.text

    @property
    def duration_s(self) -> float:
        """Length of the recording, s."""
        return self.n_samples / self.scenario.rate_hz

    @property
    def cn0_dbhz(self) -> float | None:
        """C/N0 of the main carrier at full strength, dB-Hz; None without noise."""
        return self.scenario.cn0_dbhz

    @property
    def carrier_dbfs(self) -> float:
        """RMS of the main carrier while keyed down, dB re full scale 1.0.

        A full-scale real sine is -3.01 dBFS by this measure; a complex one is 0 dBFS.
        """
        power = self.amplitude**2 if self.scenario.iq else self.amplitude**2 / 2
        return float(10 * np.log10(power))

    @property
    def noise_dbfs(self) -> float | None:
        """RMS of the noise over the whole band, dB re full scale 1.0; None without noise."""
        return float(20 * np.log10(self.noise_rms)) if self.noise_rms else None

    def snr_db(self, bandwidth_hz: float) -> float | None:
        """Carrier to noise ratio in a bandwidth: ``C/N0 - 10 log10(bandwidth_hz)``, dB.

        Examples
        --------
        >>> synth("E", cn0_dbhz=40.0).truth.snr_db(100.0)
        20.0
        """
        _require(
            _finite(bandwidth_hz) and bandwidth_hz > 0,
            self.scenario.source,
            f"bandwidth_hz is {bandwidth_hz!r}",
            "a finite bandwidth > 0, Hz",
        )
        cn0 = self.scenario.cn0_dbhz
        return None if cn0 is None else float(cn0 - 10 * np.log10(bandwidth_hz))


@dataclass(frozen=True)
class Recording:
    """A synthetic recording in memory and its truth."""

    samples: np.ndarray  # shape (n_samples,), float64 (audio) or complex128 (iq), full scale 1.0
    rate_hz: float
    truth: Truth


def _step(x_s: np.ndarray, rise_s: float) -> np.ndarray:
    """Raised-cosine step from 0 to 1 over ``rise_s``, centred on 0 (hard when rise_s is 0)."""
    if rise_s == 0:
        return (x_s >= 0).astype(float)
    return 0.5 + 0.5 * np.sin(np.pi * np.clip(x_s / rise_s, -0.5, 0.5))


class Synthesizer:
    """Render a :class:`Scenario` block by block; any block sizes give the same samples.

    Parameters
    ----------
    scenario : Scenario
        What to render.

    Notes
    -----
    The samples are, for real audio,

    .. math::

        x(t) = g(t) \\Big[ A\\,f(t)\\,d(t)\\,e(t) \\cos\\phi(t)
               + \\sum_i A_i e_i(t) \\cos 2\\pi f_i t + h(t) + c + b(t) + n(t) \\Big]

    with the main keying envelope ``e`` (raised-cosine edges), its fading ``f``, drop-outs
    ``d``, the phase ``phi`` of a carrier that drifts linearly from the first mark to the
    last, other stations ``i``, hum ``h``, DC ``c``, impulse noise bursts ``b``, white
    Gaussian noise ``n`` and the AGC's gain ``g``. With ``iq`` the cosines are complex
    exponentials and the noise is circular. See :func:`synth` for each part.
    """

    def __init__(self, scenario: Scenario):
        sc = self.scenario = scenario
        self._iq = sc.iq
        self._keying = key(
            sc.message,
            wpm=sc.wpm,
            char_wpm=sc.char_wpm,
            wpm_end=sc.wpm_end,
            dash_dot_ratio=sc.dash_dot_ratio,
            weight=sc.weight,
            jitter=sc.jitter,
            start_s=sc.lead_s,
            seed=self._seed(_MAIN_KEYING),
            source=sc.source,
        )
        others = tuple(
            None
            if st.message is None
            else key(
                st.message,
                wpm=st.wpm,
                char_wpm=st.char_wpm,
                dash_dot_ratio=sc.dash_dot_ratio,
                weight=sc.weight,
                jitter=st.jitter,
                start_s=st.start_s,
                seed=self._seed(_STATION_KEYING, i),
                source=sc.source,
            )
            for i, st in enumerate(sc.stations)
        )
        keyed = [k for k in (self._keying, *others) if k is not None and k.n_marks]
        if keyed:
            end_s = max(float(k.end_s[-1]) for k in keyed) + sc.rise_s / 2 + sc.tail_s
        else:
            end_s = sc.lead_s + sc.tail_s
        end_s = max(end_s, sc.duration_s or 0.0)
        n_samples = math.ceil(round(end_s * sc.rate_hz, 6))
        _require(n_samples > 0, sc.source, "the recording would be empty",
                 "a message, or lead_s, tail_s or duration_s > 0")  # fmt: skip

        # noise density from C/N0 (see synth): real, C = A^2/2 and N0 = 2 sigma^2 / fs;
        # complex, C = A^2 and N0 = sigma^2 / fs
        noise_per_a = 0.0
        if sc.cn0_dbhz is not None:
            cn0 = 10 ** (sc.cn0_dbhz / 10)
            noise_per_a = math.sqrt(sc.rate_hz / cn0 if sc.iq else sc.rate_hz / (4 * cn0))
        self._hum = [(k * sc.hum_hz, 1.0 / k) for k in range(1, _HUM_HARMONICS + 1)
                     if k * sc.hum_hz < sc.rate_hz / 2]  # fmt: skip
        if sc.amplitude is None:
            peak = float(self._keying.n_marks > 0)
            peak += sum(10 ** (st.level_db / 20) for st in sc.stations)
            if sc.hum_db is not None:
                peak += 10 ** (sc.hum_db / 20) * sum(a for _, a in self._hum)
            if sc.dc_db is not None:
                peak += 10 ** (sc.dc_db / 20)
            if sc.clicks_per_s:
                peak += 10 ** (sc.click_db / 20)
            peak += _NOISE_PEAK_SIGMA * noise_per_a / (math.sqrt(2) if sc.iq else 1.0)
            peak *= 10 ** (sc.agc_db / 20)
            amplitude = PEAK / peak if peak else PEAK
        else:
            amplitude = float(sc.amplitude)

        clicks = np.random.default_rng(self._seed(_CLICK_TIMES))
        n_clicks = clicks.poisson(sc.clicks_per_s * n_samples / sc.rate_hz)
        self._click_start = np.sort(clicks.integers(0, n_samples, n_clicks))
        self._click_n = max(1, round(sc.click_length_s * sc.rate_hz))
        self._fading_rad = np.random.default_rng(self._seed(_FADING)).uniform(0, 2 * np.pi)
        self._others = [
            (st, k, amplitude * 10 ** (st.level_db / 20))
            for st, k in zip(sc.stations, others, strict=True)
        ]
        self.truth = Truth(
            scenario=sc,
            keying=self._keying,
            others=others,
            n_samples=n_samples,
            amplitude=amplitude,
            noise_rms=noise_per_a * amplitude,
            click_start_s=self._click_start / sc.rate_hz,
        )
        self.rewind()

    def _seed(self, *spawn_key: int) -> np.random.SeedSequence:
        return np.random.SeedSequence(self.scenario.seed, spawn_key=spawn_key)

    def rewind(self) -> None:
        """Go back to the first sample; the next blocks repeat the recording exactly."""
        self._next = 0
        self._noise = np.random.default_rng(self._seed(_NOISE))
        self._hold = 0.0  # AGC's held level of the main carrier, 0 (none) to 1 (full)

    @property
    def n_samples(self) -> int:
        """Length of the whole recording, samples."""
        return self.truth.n_samples

    def read(self, n: int) -> np.ndarray:
        """The next ``n`` samples, fewer at the end, none after it.

        Parameters
        ----------
        n : int
            Block length, samples, >= 0.

        Returns
        -------
        ndarray, shape (m,), float64 or complex128
            ``m = min(n, samples left)``.
        """
        n = operator.index(n)
        _require(n >= 0, self.scenario.source, f"block length is {n}", "a count >= 0")
        n0 = self._next
        n1 = min(n0 + n, self.truth.n_samples)
        self._next = n1
        index = np.arange(n0, n1, dtype=np.int64)
        if index.size == 0:
            return np.empty(0, dtype=complex if self._iq else float)
        sc, amplitude = self.scenario, self.truth.amplitude
        t_s = index / sc.rate_hz
        out = np.zeros(index.size, dtype=complex if self._iq else float)

        level = self._envelope(t_s, self._keying)  # main carrier, 0..1 of A
        if self._keying.n_marks:
            if sc.fading_db:
                swing = 1 - np.cos(2 * np.pi * t_s / sc.fading_period_s + self._fading_rad)
                level *= 10 ** (-sc.fading_db / 40 * swing)
            for start_s, length_s in sc.dropouts_s:
                level[(t_s >= start_s) & (t_s < start_s + length_s)] = 0.0
            out += amplitude * level * self._oscillator(self._main_cycles(index, t_s))
        for st, keying, st_amplitude in self._others:
            cycles = index * (st.carrier_hz / sc.rate_hz)
            envelope = 1.0 if keying is None else self._envelope(t_s, keying)
            out += st_amplitude * envelope * self._oscillator(cycles)
        if sc.hum_db is not None:
            hum_amplitude = amplitude * 10 ** (sc.hum_db / 20)
            for hz, relative in self._hum:
                phase_rad = 2 * np.pi * np.mod(index * (hz / sc.rate_hz), 1.0)
                out += hum_amplitude * relative * np.cos(phase_rad)
        if sc.dc_db is not None:
            out += amplitude * 10 ** (sc.dc_db / 20)
        if self.truth.noise_rms:
            out += self._gaussian(self._noise, index.size) * self.truth.noise_rms
        if self._click_start.size:
            self._add_clicks(out, n0, n1, amplitude * 10 ** (sc.click_db / 20))
        if sc.agc_db:
            out *= 10 ** (sc.agc_db / 20 * (1 - self._agc_hold(level)))
        return out

    def _envelope(self, t_s: np.ndarray, keying: Keying) -> np.ndarray:
        """Keying envelope, 0..1, with raised-cosine edges centred on the marks' edges."""
        if not keying.n_marks:
            return np.zeros(t_s.size)
        rise_s = self.scenario.rise_s
        # the last mark whose leading edge has begun; edges never overlap (rise_s <= dot / 2
        # and every mark and gap is at least half a dot long)
        k = np.searchsorted(keying.start_s, t_s + rise_s / 2, side="right") - 1
        started = k >= 0
        k = np.maximum(k, 0)
        envelope = _step(t_s - keying.start_s[k], rise_s) - _step(t_s - keying.end_s[k], rise_s)
        envelope[~started] = 0.0
        return envelope

    def _main_cycles(self, index: np.ndarray, t_s: np.ndarray) -> np.ndarray:
        """Phase of the main carrier, cycles: the integral of its drifting frequency."""
        sc = self.scenario
        cycles = index * (sc.carrier_hz / sc.rate_hz)
        if sc.drift_hz:
            first_s, last_s = float(self._keying.start_s[0]), float(self._keying.end_s[-1])
            span_s = last_s - first_s
            ramp_s = np.clip(t_s - first_s, 0.0, span_s)
            cycles += sc.drift_hz * (ramp_s**2 / (2 * span_s) + np.maximum(t_s - last_s, 0.0))
        return cycles

    def _oscillator(self, cycles: np.ndarray) -> np.ndarray:
        phase_rad = 2 * np.pi * np.mod(cycles, 1.0)  # reduce first: t * f grows large
        return np.exp(1j * phase_rad) if self._iq else np.cos(phase_rad)

    def _gaussian(self, rng: np.random.Generator, n: int) -> np.ndarray:
        """Unit-power white Gaussian noise: real, or circular complex."""
        if not self._iq:
            return rng.standard_normal(n)
        pairs = rng.standard_normal((n, 2)) / math.sqrt(2)
        return pairs[:, 0] + 1j * pairs[:, 1]

    def _add_clicks(self, out: np.ndarray, n0: int, n1: int, peak: float) -> None:
        """Add the impulse noise bursts that overlap samples n0..n1."""
        length = self._click_n
        first = np.searchsorted(self._click_start, n0 - length, side="right")
        last = np.searchsorted(self._click_start, n1, side="left")
        decay = np.exp(-3.0 * np.arange(length) / length)
        for k in range(first, last):
            start = int(self._click_start[k])
            # each burst draws from its own stream, so that any block can render any part
            rng = np.random.default_rng(self._seed(_CLICK_WAVE, k))
            burst = self._gaussian(rng, length) * (math.sqrt(2) if self._iq else 1.0)
            if self._iq:
                burst = np.clip(burst.real, -4, 4) + 1j * np.clip(burst.imag, -4, 4)
            else:
                burst = np.clip(burst, -4, 4)
            burst *= peak / 4 * decay
            lo, hi = max(start, n0), min(start + length, n1)
            out[lo - n0 : hi - n0] += burst[lo - start : hi - start]

    def _agc_hold(self, level: np.ndarray) -> np.ndarray:
        """AGC's held carrier level: follows a rise at once, decays with agc_release_s.

        ``h[m] = max(level[m], h[m-1] a)`` with ``a = exp(-1 / (agc_release_s rate_hz))``,
        computed without a loop in the log domain: ``log h[m] = m log a + cummax(log
        level[j] - j log a)``, the held level of the previous block entering as j = -1.
        """
        log_a = -1.0 / (self.scenario.agc_release_s * self.scenario.rate_hz)
        j = np.arange(level.size)
        with np.errstate(divide="ignore"):
            log_level = np.log(level)
            log_prev = math.log(self._hold) if self._hold > 0 else -np.inf
        held = np.maximum.accumulate(np.maximum(log_level - j * log_a, log_prev + log_a))
        hold = np.exp(held + j * log_a)
        self._hold = float(hold[-1])
        return hold


def synth(message: str = "", **options: object) -> Recording:
    """A synthetic keyed recording in memory, with its truth.

    Parameters
    ----------
    message : str
        The main station's text; "" for a recording without it (noise, other stations).
    **options
        Fields of :class:`Scenario`, keyword only: ``rate_hz``, ``iq``, ``carrier_hz``,
        ``cn0_dbhz``, ``amplitude``, the timing of :func:`key` (``wpm``, ``char_wpm``,
        ``wpm_end``, ``dash_dot_ratio``, ``weight``, ``jitter``), ``rise_s``, ``lead_s``,
        ``tail_s``, ``duration_s``, ``fading_db``, ``fading_period_s``, ``drift_hz``,
        ``dropouts_s``, ``stations``, ``hum_hz``, ``hum_db``, ``dc_db``, ``clicks_per_s``,
        ``click_db``, ``click_length_s``, ``agc_db``, ``agc_release_s``, ``seed``.

    Returns
    -------
    Recording
        Samples (float64, or complex128 with ``iq``; full scale 1.0) and their truth.

    Raises
    ------
    ParameterError
        If an option is out of range, unknown, or a character has no signal.

    Notes
    -----
    **C/N0.** The main carrier has amplitude A at full strength. In real audio it is
    ``A cos(2 pi f t)``, of power ``C = A^2 / 2``, and the noise is white Gaussian of
    variance ``sigma^2`` spread over 0..fs/2, a one-sided density ``N0 = 2 sigma^2 / fs``:

    .. math:: C/N_0 = \\frac{A^2/2}{2\\sigma^2/f_s}, \\qquad
              \\sigma^2 = \\frac{A^2 f_s}{4\\, C/N_0}.

    In I/Q the carrier is ``A exp(j 2 pi f t)``, ``C = A^2``, and the circular noise of
    total variance ``E|n|^2 = sigma^2`` spreads over -fs/2..fs/2, ``N0 = sigma^2 / fs``.
    C/N0 is that of the carrier before fading and AGC; in a bandwidth B the SNR is
    ``C/N0 - 10 log10(B)`` dB (:meth:`Truth.snr_db`). Without ``amplitude``, A is chosen so
    that the sum of every part's peak, the noise counted at 6.5 standard deviations and
    the AGC at its largest gain, is 0.9 of full scale; the levels are in the truth.

    **Edges.** Each mark rises and falls along a raised cosine, ``(1 + sin(pi x /
    rise_s)) / 2`` for ``|x| <= rise_s / 2`` around the edge times of the truth, so these
    are the half-amplitude points; its 10 % to 90 % rise takes ``0.59 rise_s``. 5 ms
    edges keep key clicks low (common practice).

    **Channel.** Fading is sinusoidal in dB, between 0 and ``-fading_db`` with period
    ``fading_period_s`` and a phase drawn from the seed; the carrier's frequency moves
    linearly by ``drift_hz`` from the first mark's leading edge to the last mark's trailing
    edge, with continuous phase; a drop-out silences the main carrier. Other stations
    (:class:`Station`) are steady or keyed carriers at their own levels, unaffected by
    these. Hum is the fundamental ``hum_hz`` at ``hum_db`` and its harmonics up to the
    fifth at 1/k of it, those below fs/2. Clicks arrive as a Poisson process; each is a
    burst of Gaussian noise ``click_length_s`` long, decaying as ``exp(-3 tau / length)``,
    limited to 4 standard deviations and scaled so that this limit is ``click_db`` re A.

    **AGC.** The gain follows the main carrier's level: it holds a level that jumps up
    with the carrier and decays with ``agc_release_s``, and raises the whole signal by
    ``agc_db (1 - held)``, so the noise swells in the spaces and key-down stays at 0 dB.

    Examples
    --------
    >>> rec = synth("CQ DE XQ7ZB", wpm=25, carrier_hz=650.0, cn0_dbhz=35.0, seed=7)
    >>> rec.truth.text, rec.rate_hz, rec.samples.dtype.name
    ('CQ DE XQ7ZB', 8000.0, 'float64')
    >>> bool(np.abs(rec.samples).max() < 1.0)
    True
    """
    scenario = _scenario(message, options)
    synthesizer = Synthesizer(scenario)
    block = 1 << 16
    parts = [synthesizer.read(block) for _ in range(0, synthesizer.n_samples, block)]
    return Recording(np.concatenate(parts), scenario.rate_hz, synthesizer.truth)


def _scenario(message: str, options: dict[str, object]) -> Scenario:
    try:
        return Scenario(message, **options)  # type: ignore[arg-type]
    except TypeError as err:  # an unknown keyword
        source = options.get("source", SOURCE)
        expected = "fields of okdecode.synth.Scenario"
        raise ParameterError(source, str(err), expected=expected) from err


# Suffixes synth_file writes, to soundfile's format names ("NPY" is NumPy's own format).
_FORMATS = {".wav": "WAV", ".flac": "FLAC", ".ogg": "OGG", ".npy": "NPY"}
_DEFAULT_SUBTYPES = {"WAV": "PCM_16", "FLAC": "PCM_16", "OGG": "VORBIS"}


def synth_file(
    path: str | Path,
    message: str = "",
    *,
    subtype: str | None = None,
    block_n: int = 1 << 16,
    **options: object,
) -> Truth:
    """Write a synthetic recording to a file block by block, with bounded memory.

    Parameters
    ----------
    path : str or Path
        ``.wav``, ``.flac`` or ``.ogg`` for real audio (through soundfile), or ``.npy``
        for real or I/Q samples (float32 or complex64).
    message : str
        As for :func:`synth`.
    subtype : str or None
        soundfile's sample format (``"PCM_16"``, ``"PCM_24"``, ``"PCM_U8"``, ``"FLOAT"``,
        ...); None gives 16-bit PCM for WAV and FLAC, Vorbis for OGG.
    block_n : int
        Samples rendered at a time.
    **options
        Fields of :class:`Scenario`, as for :func:`synth`.

    Returns
    -------
    Truth
        The recording's truth; its samples are those :func:`synth` gives, rounded to the
        file's sample format.

    Raises
    ------
    ParameterError
        If an option is out of range, the suffix or sample format is unknown, a sample of
        an integer format would clip, or the file cannot be written.
    """
    path = Path(path)
    options.setdefault("source", path.name)
    scenario = _scenario(message, options)
    source = scenario.source
    kind = _FORMATS.get(path.suffix.lower())
    _require(kind is not None, source, f"cannot write {path.suffix or 'no suffix'!r}",
             "a name ending in " + ", ".join(_FORMATS))  # fmt: skip
    _require(operator.index(block_n) > 0, source, f"block_n is {block_n!r}", "a count > 0")
    synthesizer = Synthesizer(scenario)
    if kind == "NPY":
        _require(subtype is None, source, f"subtype {subtype!r} for .npy", "no subtype")
        try:
            out = np.lib.format.open_memmap(
                path, mode="w+", dtype=np.complex64 if scenario.iq else np.float32,
                shape=(synthesizer.n_samples,),
            )  # fmt: skip
        except OSError as err:
            raise ParameterError(source, f"cannot be written ({err.strerror})") from err
        for n0 in range(0, synthesizer.n_samples, block_n):
            block = synthesizer.read(block_n)
            out[n0 : n0 + block.size] = block
        out.flush()
        del out
        return synthesizer.truth

    import soundfile  # here, not at import time: start-up stays fast

    _require(not scenario.iq, source, "I/Q samples in an audio file", "a .npy name for I/Q")
    _require(float(scenario.rate_hz).is_integer(), source,
             f"rate_hz {scenario.rate_hz!r} in an audio file", "a whole number of Hz")  # fmt: skip
    subtype = subtype or _DEFAULT_SUBTYPES[kind]
    _require(soundfile.check_format(kind, subtype), source,
             f"{kind} cannot hold subtype {subtype!r}",
             ", ".join(soundfile.available_subtypes(kind)))  # fmt: skip
    clips = subtype.startswith("PCM") or subtype in ("ULAW", "ALAW")
    try:
        with soundfile.SoundFile(path, "w", int(scenario.rate_hz), 1, subtype, format=kind) as out:
            while (block := synthesizer.read(block_n)).size:
                peak = float(np.abs(block).max())
                if clips and peak > 1.0:
                    raise ParameterError(source, f"a sample of {peak:.3g} clips in {subtype}",
                                         expected="amplitude=None, or a smaller amplitude")
                out.write(block)
    except ParameterError:
        path.unlink(missing_ok=True)  # no half-written file is left behind
        raise
    except (soundfile.LibsndfileError, OSError) as err:
        raise ParameterError(source, f"cannot be written ({err})") from err
    return synthesizer.truth


class _CallableModule(types.ModuleType):
    """This module, callable as its own :func:`synth`.

    The package offers ``okdecode.synth`` as the generator function, and the name is
    also this module's; once the module is imported, the package attribute is the
    module. Calling the module calls the function, so both spellings hold (module
    ``__class__`` assignment, Python 3.5 and later).
    """

    def __call__(self, message: str = "", **options: object) -> Recording:
        return synth(message, **options)


sys.modules[__name__].__class__ = _CallableModule
