"""decode_array / decode_file: run the stages in order.

capture -> search_carriers -> tune -> fine offset -> envelope -> marks -> symbols ->
text -> report. The envelope is made first with a few filter lengths; the one whose
decode explains the durations best gives the speed, and the envelope is then made
again with the moving average matched to the dot (re-tuning to the speed).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from os import PathLike

import numpy as np

from . import DECODERS, DEFAULT_DECODER, report
from . import baseband as bb
from . import marks as mk
from . import symbols as sy
from . import text as tx
from .capture import Capture, from_array, open_capture
from .errors import ParameterError

#: Speeds that people and keyers send at, WPM; decodes outside count for less.
PLAUSIBLE_WPM = (4.0, 60.0)
#: Filter lengths tried before the speed is known, s (they suit about 5 to 60 WPM).
FIRST_FILTERS_S = (0.012, 0.024, 0.048, 0.096, 0.192)
#: Length of the stretch of a long recording on which the filter length is chosen, s.
SELECT_SPAN_S = 120.0
#: A keyed carrier spread wider than this is taken for a pulsed (spark) one, Hz. On-off
#: keying at 50 WPM with 5 ms edges spreads a steady carrier over about 200 Hz.
WIDE_CARRIER_HZ = 600.0
#: Below the search's threshold, the sequence decoder tries the keying line of this many
#: of the best-scoring bins, if their score reaches WEAK_MIN_SCORE.
WEAK_TRIES = 3
WEAK_MIN_SCORE = 2.0
#: Widest band summed for a pulsed carrier, Hz (each side).
MAX_WIDE_HALF_BAND_HZ = 12000.0


@dataclass(frozen=True)
class Options:
    """Decode options, checked once."""

    carrier_hz: float | None = None
    channel: int | None = None
    wpm: float | None = None
    decoder: str = DEFAULT_DECODER

    @classmethod
    def checked(cls, source: str, *, carrier_hz=None, channel=None, wpm=None,
                decoder=DEFAULT_DECODER) -> Options:
        if carrier_hz is not None:
            # its band is checked against the capture's when tuning
            carrier_hz = _number(source, "carrier", carrier_hz, "Hz")
        if channel is not None:
            if isinstance(channel, bool) or not isinstance(channel, (int, np.integer)) or (
                    channel < 0):
                raise ParameterError(source, f"channel {channel!r}",
                                     expected="a channel index 0, 1, ...")
            channel = int(channel)
        if wpm is not None:
            wpm = _number(source, "speed", wpm, "WPM")
            if not 1.0 <= wpm <= 100.0:
                raise ParameterError(source, f"speed {wpm:g} WPM", expected="1 to 100 WPM")
        if decoder not in DECODERS:
            raise ParameterError(source, f"decoder {decoder!r}", expected=" or ".join(DECODERS))
        return cls(carrier_hz=carrier_hz, channel=channel, wpm=wpm, decoder=decoder)


def _number(source: str, what: str, value, unit: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        v = math.nan
    if not math.isfinite(v):
        raise ParameterError(source, f"{what} {value!r} {unit}", expected="a finite number")
    return v


def decode_capture(capture: Capture, *, carrier_hz: float | None = None,
                   channel: int | None = None, wpm: float | None = None,
                   decoder: str = DEFAULT_DECODER, progress=None) -> report.Reception:
    """Decode an opened capture. See :func:`decode_file` for the options."""
    return _decode(capture, carrier_hz=carrier_hz, channel=channel, wpm=wpm,
                   decoder=decoder, progress=progress, all_carriers=False)[0]


def decode_all_carriers(capture: Capture, *, channel: int | None = None,
                        wpm: float | None = None, decoder: str = DEFAULT_DECODER,
                        progress=None) -> list[report.Reception]:
    """Decode every keyed carrier the search finds, each on its own, in order of time.

    The receptions come in the order their first characters were heard (stations that
    follow one another read in turn); ``carrier_rank`` in each gives its rank by
    strength, 0 the strongest. The capture is read twice in all (the search, then one
    pass that tunes to every carrier at once). A recording without any keyed carrier
    gives one empty Reception.
    """
    found = _decode(capture, carrier_hz=None, channel=channel, wpm=wpm, decoder=decoder,
                    progress=progress, all_carriers=True)
    return sorted(found, key=lambda r: r.characters[0].start_s if r.characters else math.inf)


@dataclass(frozen=True)
class _Target:
    """A carrier to decode and what the search knew of it."""

    tuning: bb.Tuning
    found: bb.Carrier | None
    notes: tuple[str, ...]
    baseband: bb.Baseband | None = None  # already tuned while it was being found


def _decode(capture: Capture, *, carrier_hz, channel, wpm, decoder, progress,
            all_carriers: bool) -> list[report.Reception]:
    opts = Options.checked(capture.source, carrier_hz=carrier_hz, channel=channel, wpm=wpm,
                           decoder=decoder)
    warnings: list[str] = []
    notes: list[str] = list(capture.notes)
    if opts.channel is not None and opts.channel >= capture.n_channels:
        raise ParameterError(capture.source, f"channel {opts.channel} does not exist",
                             expected=f"0 to {capture.n_channels - 1}")
    spectrum = None
    chan = opts.channel
    targets: list[_Target] = []
    if opts.carrier_hz is None or (chan is None and capture.n_channels > 1):
        spectrum = bb.search_carriers(capture, progress=progress)
        first_bin_hz = spectrum.bin_hz
        found = [c for c in spectrum.carriers if chan is None or c.channel == chan]
        if opts.carrier_hz is not None:
            near = [c for c in found
                    if abs(c.frequency_hz - opts.carrier_hz) < 3 * spectrum.bin_hz]
            found = near or found
        if not found and opts.carrier_hz is None:
            # slow keying holds its marks over many frames, and frames three times longer
            # see three times the carrier's energy against the same noise per bin: the
            # carrier of 5 WPM code at 19 dB-Hz stands clear there and not in the first
            fine = bb.search_carriers(capture, progress=progress,
                                      frame_s=FINE_FRAMES * bb.SEARCH_FRAME_S)
            found = [c for c in fine.carriers if chan is None or c.channel == chan]
            if found:
                spectrum = fine
                notes.append("carrier found by the search with longer frames "
                             f"({fine.bin_hz:.0f} Hz bins)")
        if not found and opts.carrier_hz is None:
            weak = _weak_target(capture, spectrum, chan, progress=progress)
            if weak is not None:
                targets.append(weak)
        if not found and not targets and opts.carrier_hz is None:
            warnings.append("no keyed signal found")
            return [report.empty(file=capture.source, duration_s=capture.duration_s,
                                 rate_hz=capture.rate_hz, channel=chan, decoder=opts.decoder,
                                 warnings=warnings, notes=notes, spectrum=spectrum)]
        if all_carriers and found and spectrum.bin_hz == first_bin_hz:
            # the first search's bins merge close stations (the longer frames' do not)
            found = found + _close_neighbours(capture, spectrum, found, chan,
                                              progress=progress)
        for c in _distinct(found):
            targets.append(_target(c, capture, spectrum, opts, chan,
                                   others=[o for o in found if o is not c]))
            if not all_carriers:
                break
    if not targets:
        targets.append(_Target(bb.Tuning(float(opts.carrier_hz), 0 if chan is None else chan),
                               None, ()))
    # one pass tunes every target not tuned already
    todo = [t for t in targets if t.baseband is None]
    tuned = iter(bb.tune_many(capture, [t.tuning for t in todo], progress=progress)
                 if todo else [])
    bases = [t.baseband if t.baseband is not None else next(tuned) for t in targets]
    out = []
    for rank, (target, base) in enumerate(zip(targets, bases, strict=True)):
        extra = {"spark_rate_hz": None, "ringing_hz": None, "drift_hz": None}
        if all_carriers:
            extra["carrier_rank"] = rank
        base, more = _settle(base, target, spectrum, opts, extra)
        out.append(_decode_baseband(base, capture, opts, list(warnings),
                                    notes + list(target.notes) + more, spectrum, extra))
    return out


def _weak_target(capture: Capture, spectrum: bb.Spectrum, chan: int | None, *,
                 progress=None) -> _Target | None:
    """A carrier under the search's threshold whose keying line is there, or None.

    Both decoders reach further down than the carrier search does. The few bins
    with the highest keying score are tuned (one more pass over the capture) and each
    baseband is asked for the spectral line of its rising edges, whose false-alarm
    probability on noise is known (:func:`okdecode.sequence.line_unit_s`); the best
    line is taken if that probability, times the number of bins tried, is under 1 %.
    """
    from . import sequence

    score = spectrum.score if chan is None else spectrum.score[chan : chan + 1]
    freq = spectrum.frequency_hz
    rel = freq - capture.center_hz
    usable = np.ones(freq.size, dtype=bool)
    if not capture.is_complex:
        usable = (rel >= 100.0) & (rel <= capture.rate_hz / 2 - 2 * spectrum.bin_hz)
    picks: list[tuple[int, int]] = []
    for flat in np.argsort(-score, axis=None):
        ch, b = np.unravel_index(flat, score.shape)
        if score[ch, b] < WEAK_MIN_SCORE:
            break
        if not usable[b]:
            continue
        if any(abs(int(b) - pb) <= 3 for _, pb in picks):
            continue
        picks.append((int(ch) if chan is None else chan, int(b)))
        if len(picks) >= WEAK_TRIES:
            break
    if not picks:
        return None
    tunings = [bb.Tuning(float(freq[b]), ch) for ch, b in picks]
    best = None
    for tuning, base in zip(tunings, bb.tune_many(capture, tunings, progress=progress),
                            strict=True):
        base = bb.shift(base, bb.fine_offset_hz(base, max_offset_hz=spectrum.bin_hz))
        unit_s, p_fa = sequence.line_unit_s(base)
        if unit_s is not None and (best is None or p_fa < best[0]):
            best = (p_fa, replace(tuning, carrier_hz=base.carrier_hz), base)
    if best is None or best[0] * len(picks) > 0.01:
        return None
    note = (f"carrier found by its keying line at {best[1].carrier_hz:.0f} Hz, under the "
            f"search's threshold (false-alarm probability {best[0] * len(picks):.1g})")
    return _Target(best[1], None, (note,), baseband=best[2])


#: For --all-carriers, a second search with frames this many times longer resolves
#: keyed carriers closer together than the first search's bins allow.
FINE_FRAMES = 3


def _close_neighbours(capture: Capture, spectrum: bb.Spectrum, found: list[bb.Carrier],
                      chan: int | None, *, progress=None) -> list[bb.Carrier]:
    """Keyed carriers next to the ones found, which the first search's bins merged.

    The first search owns a carrier's neighbouring bins (its window's main lobe, 4 bins of
    77 Hz each side), so a second station 100 to 300 Hz away is taken for part of it. A
    search with frames FINE_FRAMES times longer (bins of about 26 Hz) tells them apart;
    a carrier it finds is new when it lies inside a first carrier's owned bins and more
    than two of its own bins (and a first bin) from every carrier found.
    """
    # each fine carrier owns only its main lobe: next to a keyed carrier, another one is
    # keyed too, and a span of keyed bins would join them
    fine = bb.search_carriers(capture, progress=progress,
                              frame_s=FINE_FRAMES * bb.SEARCH_FRAME_S, own_span=False)
    owned_hz = 4.0 * spectrum.bin_hz
    apart_hz = max(2.0 * fine.bin_hz, spectrum.bin_hz)
    new: list[bb.Carrier] = []
    for c in fine.carriers:
        if chan is not None and c.channel != chan:
            continue
        near = [abs(c.frequency_hz - k.frequency_hz) for k in found + new
                if k.channel == c.channel]
        if near and min(near) > apart_hz and min(near) <= owned_hz:
            new.append(c)
    return new


def _distinct(found: list[bb.Carrier]) -> list[bb.Carrier]:
    """Carriers with the lines of a stronger spark train's comb taken out."""
    kept: list[bb.Carrier] = []
    for c in found:
        if any(k.width_hz > WIDE_CARRIER_HZ
               and abs(c.frequency_hz - k.frequency_hz) <= 2 * k.width_hz for k in kept):
            continue
        kept.append(c)
    return kept


def _target(best: bb.Carrier, capture: Capture, spectrum: bb.Spectrum, opts: Options,
            chan: int | None, *, others: list[bb.Carrier]) -> _Target:
    notes = []
    if chan is None and capture.n_channels > 1:
        notes.append(f"channel {best.channel} has the strongest keyed signal")
    wide_hz = None
    if best.width_hz > WIDE_CARRIER_HZ:
        # keyed power spread far wider than keying spreads it: damped waves or a pulse
        # train, whose bursts add in power
        wide_hz = min(0.75 * best.width_hz + spectrum.bin_hz, MAX_WIDE_HALF_BAND_HZ)
        notes.append(f"pulsed or damped-wave carrier, {best.width_hz:.0f} Hz wide; "
                     "bursts are summed in power")
    # a spark train's comb reaches past its span: its lines are not other stations
    reach_hz = 2 * best.width_hz if wide_hz is not None else 0.0
    rest = [c for c in others if abs(c.frequency_hz - best.frequency_hz) > reach_hz
            and (wide_hz is None or c.level_db > best.level_db - 20.0)]
    if rest:
        listed = ", ".join(f"{c.frequency_hz:.0f}" for c in rest[:3])
        notes.append(f"other keyed carriers at {listed} Hz")
    carrier = best.frequency_hz if opts.carrier_hz is None else opts.carrier_hz
    return _Target(bb.Tuning(float(carrier), best.channel if chan is None else chan, wide_hz),
                   best, tuple(notes))


def _settle(base: bb.Baseband, target: _Target, spectrum, opts: Options, extra: dict
            ) -> tuple[bb.Baseband, list[str]]:
    """Fine tuning and drift for a steady carrier; spark figures for a pulsed one."""
    notes = []
    if base.power is None:
        search_bin = spectrum.bin_hz if spectrum is not None else 0.0
        max_off = max(1.0 * search_bin, 25.0) if opts.carrier_hz is None else 40.0
        part, _ = _busiest(base, base.samples, span_s=SELECT_SPAN_S)
        base = bb.shift(base, bb.fine_offset_hz(part, max_offset_hz=max_off))
        track = bb.drift_track_hz(base)
        if track is not None:
            base = bb.follow(base, track)
            extra["drift_hz"] = round(float(np.ptp(track)), 1)
            notes.append(f"carrier drifts over {np.ptp(track):.0f} Hz; followed")
    elif target.found is not None:
        extra["ringing_hz"] = _round_or_none(target.found.centroid_hz, 1)
        extra["spark_rate_hz"] = _round_or_none(base.spark_rate_hz, 1)
        if base.spark_rate_hz is not None and target.found.centroid_hz is not None:
            notes.append(f"spark rate {base.spark_rate_hz:.0f} Hz, ringing near "
                         f"{target.found.centroid_hz:.0f} Hz")
    return base, notes


def _round_or_none(v: float | None, nd: int) -> float | None:
    return None if v is None else round(float(v), nd)


def _decode_baseband(base: bb.Baseband, capture: Capture, opts: Options, warnings, notes,
                     spectrum, extra: dict) -> report.Reception:
    source = capture.source
    density = bb.noise_density(base)
    # the filter length is chosen on the busiest stretch of a long recording
    part, part_density = _busiest(base, density, span_s=SELECT_SPAN_S)
    best = None
    first = (1.2 / opts.wpm,) if opts.wpm else FIRST_FILTERS_S
    for filter_s in first:
        trial = _run(part, source, filter_s=filter_s, wpm=opts.wpm, density=part_density)
        if best is None or trial[0] > best[0]:
            best = trial
    assert best is not None
    score, env, found, syms, decoded = best
    if syms.dot_s is None or part is not base:
        syms_dot = syms.dot_s
        score, env, found, syms, decoded = _run(base, source, filter_s=syms_dot or first[0],
                                                wpm=opts.wpm, density=density)
    if syms.dot_s is not None:
        # re-tune: the moving average matched to the dot, then once more if it moved
        for _ in range(2):
            dot = _shortest_unit_s(syms)
            if abs(env.filter_s / dot - 1) < 0.1:
                break
            trial = _run(base, source, filter_s=dot, wpm=opts.wpm, density=density)
            if trial[3].dot_s is None:
                break
            score, env, found, syms, decoded = trial
    if opts.decoder == "sequence" and base.power is None and syms.dot_s is not None:
        from . import sequence

        found, syms = sequence.refine(base, env, found, syms, source=source)
        if not opts.wpm:
            syms = sy.refit_unit(syms)
        decoded = tx.decode(syms)
    if not decoded.characters:
        warnings.append("no keyed signal found")
        return report.empty(file=source, duration_s=capture.duration_s,
                            rate_hz=capture.rate_hz, channel=base.channel,
                            decoder=opts.decoder, warnings=warnings, notes=notes,
                            spectrum=spectrum, carrier_hz=base.carrier_hz, baseband=base,
                            envelope=env, marks=found, extra=extra)
    level = report.measure(base, found, dot_s=syms.dot_s or env.filter_s,
                           detection_bandwidth_hz=env.noise_bandwidth_hz,
                           is_complex=capture.is_complex)
    if decoded.n_unknown:
        warnings.append(f"{decoded.n_unknown} pattern(s) not in the ITU-R M.1677-1 table")
    if level.snr_db is not None and level.snr_db < 6.0:
        warnings.append(f"weak signal: SNR {level.snr_db:.1f} dB in "
                        f"{level.snr_bandwidth_hz:.0f} Hz; expect errors")
    for a, b in zip(syms.held_start_s, syms.held_end_s, strict=True):
        notes.append(f"key held down for {b - a:.1f} s from {a:.2f} s (no element; "
                     "not in the text)")
    if syms.farnsworth and syms.farnsworth_wpm is not None:
        notes.append(f"Farnsworth spacing: characters at {syms.wpm:.1f} WPM, "
                     f"overall {syms.farnsworth_wpm:.1f} WPM")
    return report.assemble(file=source, decoded=decoded, symbols=syms, marks=found,
                           envelope=env, baseband=base, level=level,
                           duration_s=capture.duration_s, rate_hz=capture.rate_hz,
                           channel=base.channel, decoder=opts.decoder, warnings=warnings,
                           notes=notes, spectrum=spectrum, extra=extra)


def _shortest_unit_s(syms: sy.Symbols) -> float:
    """The unit to match the envelope's filter to, s: the recording's, or a faster one.

    Where the speed changes, a filter matched to the slower part merges the faster
    part's marks; the fastest sustained part (the 10th percentile of the marks' own
    units) sets the filter then, at a few dB less SNR for the slower part.
    """
    assert syms.dot_s is not None
    fast = float(np.quantile(syms.local_dot_s, 0.1)) if syms.n_marks else syms.dot_s
    return fast if fast < 0.75 * syms.dot_s else syms.dot_s


def _busiest(base: bb.Baseband, density: np.ndarray, *, span_s: float
             ) -> tuple[bb.Baseband, np.ndarray]:
    """The stretch of ``span_s`` whose power varies most (the keying), or all of it."""
    rate = base.rate_hz
    n_span = int(span_s * rate)
    if base.samples.size <= n_span:
        return base, density
    chunk = max(1, int(5.0 * rate))
    n_chunks = base.samples.size // chunk
    z = base.samples[: n_chunks * chunk]
    p = (z.real**2 + z.imag**2).reshape(n_chunks, chunk)
    var = p.var(axis=1)
    k = max(1, n_span // chunk)
    run = np.convolve(var, np.ones(k), mode="valid")
    first = int(np.argmax(run)) * chunk
    sl = slice(first, first + k * chunk)
    part = replace(base, samples=base.samples[sl], start_s=base.start_s + first / rate,
                   power=None if base.power is None else base.power[sl])
    return part, density[sl]


def _run(base: bb.Baseband, source: str, *, filter_s: float, wpm: float | None,
         density: np.ndarray | None = None):
    """One envelope, marks, symbols and text at a filter length, with a fit score."""
    env = bb.envelope(base, filter_s=filter_s, source=source, density=density)
    unit = filter_s if wpm is None else 1.2 / wpm
    found = mk.find(env, window_s=max(1.0, 25 * unit), min_mark_s=0.4 * unit,
                    min_space_s=0.4 * unit)
    syms = sy.classify(found, wpm=wpm)
    if syms.dot_s is not None and found.n_marks:
        # glitches are judged again against the dot now known
        found = mk.find(env, window_s=max(1.0, 25 * syms.dot_s), min_mark_s=0.4 * syms.dot_s,
                        min_space_s=0.4 * syms.dot_s, levels_=found.levels)
        syms = sy.classify(found, wpm=wpm)
    decoded = tx.decode(syms)
    score = _fit_score(syms, decoded, filter_s)
    return score, env, found, syms, decoded


def _fit_score(syms: sy.Symbols, decoded: tx.Decoded, filter_s: float) -> float:
    """How well a decode explains the marks: mean confidence of its characters.

    A filter much longer than the dot smears the marks together, and one much shorter
    lets noise through, so the decode that fits the code best marks the right length.
    """
    if not decoded.characters or syms.dot_s is None:
        return -1.0
    conf = np.array([c.confidence if c.char != tx.PLACEHOLDER else 0.0
                     for c in decoded.characters])
    mismatch = abs(math.log(syms.dot_s / filter_s))
    # the mean, not the sum: noise let through a short filter makes many characters
    # whose elements fit no class well; a decode whose dot is far from the filter's
    # length is not self-consistent
    score = float(conf.mean()) * math.exp(-0.5 * max(mismatch - math.log(2.5), 0.0))
    # and hand keys and keyers send from about 4 to 60 WPM: noise read through the
    # shortest filter at 150 WPM may fit its classes, but is no sending
    lo, hi = PLAUSIBLE_WPM
    return score if lo <= 1.2 / syms.dot_s <= hi else 0.5 * score


def decode_array(samples: np.ndarray, rate_hz: float, *, center_hz: float = 0.0,
                 source: str = "<array>", **options) -> report.Reception:
    """Decode samples held in memory.

    Parameters
    ----------
    samples : ndarray, shape (n,) or (n, channels), real or complex
        Real audio or trace samples, or complex I/Q baseband.
    rate_hz : float
        Sample rate, Hz.
    center_hz : float
        For I/Q: the frequency of baseband 0 Hz, Hz.
    **options
        As for :func:`decode_file`.
    """
    return decode_capture(from_array(samples, rate_hz, center_hz=center_hz, source=source),
                          **options)


def decode_file(path: str | PathLike, *, carrier_hz: float | None = None,
                channel: int | None = None, wpm: float | None = None,
                decoder: str = DEFAULT_DECODER, progress=None, **reader_options
                ) -> report.Reception:
    """Decode one recording.

    Parameters
    ----------
    path : str or PathLike
        The recording.
    carrier_hz : float, optional
        Carrier frequency, Hz (absolute); found from the spectrum when not given.
    channel : int, optional
        Channel index; default: the channel with the strongest keyed signal.
    wpm : float, optional
        Sending speed, WPM, when known.
    decoder : str
        ``"sequence"`` (the default: the soft-decision sequence decoder, which starts from
        the threshold's decision) or ``"threshold"`` (adaptive threshold, element by
        element).
    progress : callable, optional
        Called with the number of samples handled after each block.
    **reader_options
        Passed to the reader (rate, format, ...).

    Returns
    -------
    Reception

    Raises
    ------
    CaptureError
        If the file cannot be read as a recording.
    ParameterError
        If an option is absurd.
    """
    capture = open_capture(path, **reader_options)
    return decode_capture(capture, carrier_hz=carrier_hz, channel=channel, wpm=wpm,
                          decoder=decoder, progress=progress)
