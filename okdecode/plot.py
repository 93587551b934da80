"""Figures of a reception: what the receiver heard and why it decoded what it did.

One figure, built on the stages' results that a :class:`~okdecode.report.Reception`
carries:

1. the spectrum of the carrier search over the whole band, with the decoded carrier,
   the other keyed candidates (not decoded) and the keying score against its
   threshold; beside it a fine Welch spectrum [1]_ of the stored baseband around the
   carrier with the detection band (the envelope's noise bandwidth) shaded;
2. a spectrogram (waterfall) of the baseband near the carrier over the recording;
3. the envelope with the noise floor, the mark level and the threshold as they moved,
   the marks shaded and the decoded characters written above their marks
   (placeholders for patterns the table lacks in a contrasting, boxed style);
4. histograms of mark and space durations in dot units, with the 1 and 3 (marks) and
   1, 3 and 7 (spaces) classes of ITU-R M.1677-1 [2]_ marked.

Long recordings get the whole file as an overview plus zooms on each transmission
(characters separated by pauses longer than ``PAUSE_UNITS`` dots), each at most
``MAX_ZOOM_CHARS`` characters, at most ``MAX_ZOOMS`` of them. Whatever the length,
the envelope is drawn as its minimum and maximum over at most ``MAX_COLUMNS`` columns,
the spectrogram averages its frames into at most ``MAX_COLUMNS`` columns, and both
work through the baseband in batches, so memory stays bounded by a small multiple of
the envelope that the reception already holds.

Colours are the Okabe-Ito palette, distinguishable with the common colour-vision
deficiencies [3]_, and lines differ in style as well as colour.

References
----------
.. [1] P. D. Welch, "The use of fast Fourier transform for the estimation of power
   spectra", IEEE Trans. Audio Electroacoust. 15(2), 1967.
.. [2] ITU-R Recommendation M.1677-1, "International Morse code", 2009.
.. [3] M. Okabe and K. Ito, "Color Universal Design (CUD): how to make figures and
   presentations that are friendly to colorblind people", J*FLY, 2002.
"""

from __future__ import annotations

import math
from os import PathLike
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from .errors import ParameterError
from .symbols import CHARACTER, ELEMENT, PAUSE_UNITS, WORD
from .text import PLACEHOLDER

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

    from .report import Reception

#: Okabe-Ito colours by role.
COLOURS = {
    "black": "#000000", "orange": "#E69F00", "sky": "#56B4E9", "green": "#009E73",
    "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "purple": "#CC79A7",
    "grey": "#999999",
}  # fmt: skip
#: Most columns a time axis is drawn with (the envelope's min/max, the spectrogram).
MAX_COLUMNS = 1500
#: Most characters written in one zoom panel.
MAX_ZOOM_CHARS = 48
#: Transmissions shorter than this (stray characters in pauses) get zooms last.
MIN_ZOOM_CHARS = 5
#: Most zoom panels in one figure.
MAX_ZOOMS = 8
#: Characters less sure than this are written in italics.
LOW_CONFIDENCE = 0.5
#: Longest decoded text in the title, characters.
MAX_TITLE_CHARS = 110
#: Figure formats, by file suffix.
FORMATS = (".png", ".svg", ".pdf")
#: Frames per batch times frame length: bounds the temporaries of the spectra.
_BATCH_SAMPLES = 1 << 17


# ---------------------------------------------------------------------------------------
# Public


def plot_reception(result: Reception) -> Figure:
    """One figure that shows a reception: spectrum, waterfall, envelope, timing.

    Parameters
    ----------
    result : Reception
        What :func:`okdecode.decode_file` or :func:`okdecode.decode_array` returned.
        Its envelope, marks, symbols, spectrum and baseband may each be None (nothing
        found, or the carrier given so no search made); the panels then say so.

    Returns
    -------
    matplotlib.figure.Figure
        Not attached to pyplot, so no display is needed; save it with
        :func:`write_figure` or ``fig.savefig``.

    Notes
    -----
    See the module notes for the panels and the bounds on drawing long recordings.

    Examples
    --------
    >>> from okdecode.receiver import decode_array
    >>> from okdecode.synth import synth
    >>> rec = synth("XQ7ZB", rate_hz=8000.0, cn0_dbhz=40.0, seed=1)
    >>> fig = plot_reception(decode_array(rec.samples, rec.rate_hz, source="demo.wav"))
    >>> [t.get_text() for ax in fig.axes for t in ax.texts if t.get_gid() == "character"]
    ['X', 'Q', '7', 'Z', 'B']
    """
    from matplotlib.figure import Figure

    dot_s = _dot_s(result)
    chunks, n_chunks = _zoom_chunks(result, dot_s)
    on_overview = not chunks  # the overview itself is legible: characters go there
    n_zoom = len(chunks)
    heights = [3.0, 2.2, 2.6] + [2.1] * n_zoom
    fig = Figure(figsize=(14.0, 1.4 + sum(heights)), layout="constrained")
    grid = fig.add_gridspec(len(heights), 4, height_ratios=heights)
    ax_spec = fig.add_subplot(grid[0, 0])
    ax_fine = fig.add_subplot(grid[0, 1])
    ax_hist_m = fig.add_subplot(grid[0, 2])
    ax_hist_s = fig.add_subplot(grid[0, 3])
    ax_wf = fig.add_subplot(grid[1, :])
    ax_env = fig.add_subplot(grid[2, :], sharex=ax_wf)

    _draw_search_spectrum(ax_spec, result)
    _draw_fine_spectrum(ax_fine, result)
    _draw_histograms(ax_hist_m, ax_hist_s, result)
    _draw_waterfall(ax_wf, result, fig)
    t0, t1 = 0.0, max(result.duration_s, 1e-3)
    ax_wf.set_xlim(t0, t1)
    _draw_envelope(ax_env, result, t0, t1, characters=on_overview, legend=True)
    ax_env.set_xlim(t0, t1)
    if chunks:
        _mark_chunks(ax_env, result, chunks)
        ax_env.set_title(f"envelope, whole recording; zooms 1 to {n_zoom} below"
                         + (f" ({n_zoom} of {n_chunks} stretches of up to {MAX_ZOOM_CHARS} "
                            "characters)" if n_chunks > n_zoom else ""),
                         loc="left", fontsize=10)
    else:
        ax_env.set_title("envelope and decoded characters" if result.characters
                         else "envelope, whole recording", loc="left", fontsize=10)
    for k, (i, j) in enumerate(chunks):
        ax = fig.add_subplot(grid[3 + k, :])
        chars = result.characters
        pad_s = max(5 * dot_s, 0.3)
        z0 = max(chars[i].start_s - pad_s, 0.0)
        z1 = min(chars[j - 1].end_s + pad_s, t1)
        _draw_envelope(ax, result, z0, z1, characters=True, first=i, last=j)
        ax.set_xlim(z0, z1)
        ax.set_title(f"zoom {k + 1}: {z0:.1f} to {z1:.1f} s, characters {i + 1} to {j} "
                     f"of {len(chars)}", loc="left", fontsize=10)
    fig.suptitle(_title(result), fontsize=11, ha="left", x=0.01)
    if not result.characters:
        what = next((w for w in result.warnings if "no keyed signal" in w),
                    "no keyed signal found")
        for ax in (ax_env, ax_wf):
            ax.text(0.5, 0.5, f"{_name(result)}: {what}", transform=ax.transAxes,
                    ha="center", va="center", fontsize=13, color=COLOURS["vermillion"],
                    bbox={"facecolor": "white", "edgecolor": COLOURS["vermillion"]},
                    gid="no-signal")
    return fig


def write_figure(result: Reception, path: str | PathLike) -> Path:
    """Write :func:`plot_reception`'s figure to a file, format by suffix.

    Parameters
    ----------
    result : Reception
    path : str or PathLike
        Ends in ``.png``, ``.svg`` or ``.pdf``.

    Returns
    -------
    Path
        The file written (for reports that link to it).

    Raises
    ------
    ParameterError
        If the suffix is none of those, or the file cannot be written.
    """
    p = Path(path)
    suffix = p.suffix.lower()
    if suffix not in FORMATS:
        raise ParameterError(str(path), f"figure format {suffix or '(none)'!r}",
                             expected=", ".join(FORMATS))
    fig = plot_reception(result)
    try:
        fig.savefig(p, format=suffix[1:], dpi=100)
    except OSError as err:
        raise ParameterError(str(path), f"cannot write the figure ({err.strerror or err})"
                             ) from err
    return p


# ---------------------------------------------------------------------------------------
# Grouping characters into transmissions and zooms


def transmissions(result: Reception, *, dot_s: float | None = None) -> list[tuple[int, int]]:
    """Runs of characters separated by pauses, as index ranges ``[i, j)``.

    Parameters
    ----------
    result : Reception
    dot_s : float, optional
        Unit, s; default the reception's.

    Returns
    -------
    list of (int, int)
        A pause is a space longer than ``PAUSE_UNITS`` dots (the symbol stage's bound
        between a word gap and a pause).
    """
    chars = result.characters
    if not chars:
        return []
    unit = dot_s if dot_s is not None else _dot_s(result)
    start = np.array([c.start_s for c in chars])
    end = np.array([c.end_s for c in chars])
    breaks = np.flatnonzero(start[1:] - end[:-1] > PAUSE_UNITS * unit) + 1
    edges = np.concatenate([[0], breaks, [len(chars)]])
    return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:], strict=True)]


def _zoom_chunks(result: Reception, dot_s: float) -> tuple[list[tuple[int, int]], int]:
    """Character ranges to zoom on, and how many there were before the cap.

    None when the overview can carry the characters itself: few of them, spread over
    a good part of the recording.
    """
    chars = result.characters
    if not chars:
        return [], 0
    span_s = chars[-1].end_s - chars[0].start_s
    if len(chars) <= MAX_ZOOM_CHARS and span_s >= 0.25 * result.duration_s:
        return [], 1
    per_tx = [_split_at_words(chars, i, j) for i, j in transmissions(result, dot_s=dot_s)]
    n_chunks = sum(len(p) for p in per_tx)
    # first the start of every transmission of a few characters or more, the longest
    # first; then more of the long ones, spread so that each is seen from start to end;
    # last the stray characters in the pauses
    longest = max(p[-1][1] - p[0][0] for p in per_tx)
    big = [p for p in per_tx if p[-1][1] - p[0][0] >= min(MIN_ZOOM_CHARS, longest)]
    small = [p[0] for p in per_tx if p[-1][1] - p[0][0] < min(MIN_ZOOM_CHARS, longest)]
    chosen = sorted((p[0] for p in big), key=lambda c: (-(c[1] - c[0]), c[0]))[:MAX_ZOOMS]
    rest = [c for p in big for c in p[1:]]
    n_left = MAX_ZOOMS - len(chosen)
    if rest and n_left > 0:
        picks = np.unique(np.round(np.linspace(0, len(rest) - 1, min(n_left, len(rest)))))
        chosen += [rest[int(k)] for k in picks]
    chosen += small[: MAX_ZOOMS - len(chosen)]
    return sorted(chosen), n_chunks


def _split_at_words(chars, i: int, j: int) -> list[tuple[int, int]]:
    """Characters [i, j) in runs of at most MAX_ZOOM_CHARS, cut before a word if one is near."""
    out = []
    a = i
    while a < j:
        b = min(a + MAX_ZOOM_CHARS, j)
        if b < j:
            words = [k for k in range(a + MAX_ZOOM_CHARS // 2, b + 1) if chars[k].word_start]
            b = words[-1] if words else b
        out.append((a, b))
        a = b
    return out


def _mark_chunks(ax: Axes, result: Reception, chunks: list[tuple[int, int]]) -> None:
    chars = result.characters
    tx = ax.get_xaxis_transform()
    for k, (i, j) in enumerate(chunks):
        a, b = chars[i].start_s, chars[j - 1].end_s
        ax.plot([a, b], [0.99, 0.99], transform=tx, color=COLOURS["vermillion"], lw=3,
                solid_capstyle="butt")
        ax.text(0.5 * (a + b), 0.96, str(k + 1), transform=tx, ha="center", va="top",
                fontsize=8, color=COLOURS["vermillion"], gid="zoom-label",
                bbox={"boxstyle": "round,pad=0.15", "facecolor": "white",
                      "edgecolor": COLOURS["vermillion"], "lw": 0.8})


# ---------------------------------------------------------------------------------------
# Panel 1: spectra


def _draw_search_spectrum(ax: Axes, result: Reception) -> None:
    spec = result.spectrum
    ax.set_title("carrier search", loc="left", fontsize=10)
    if spec is None:
        ax.set_axis_off()
        ax.text(0.5, 0.5, "no carrier search:\nthe carrier was given", ha="center",
                va="center", transform=ax.transAxes, fontsize=10)
        return
    ch = result.channel if result.channel is not None else 0
    ch = min(ch, spec.power_dbfs.shape[0] - 1)
    ref_hz, scale, unit = _frequency_axis(spec.frequency_hz, result.carrier_hz)
    f = (spec.frequency_hz - ref_hz) / scale
    ax.plot(f, spec.power_dbfs[ch], color=COLOURS["black"], lw=1.0, label="mean power")
    ax.set_xlabel(_frequency_label(ref_hz, unit))
    ax.set_ylabel("power, dBFS per bin")
    twin = ax.twinx()
    twin.plot(f, spec.score[ch], color=COLOURS["purple"], lw=0.7, ls="--", alpha=0.8,
              label="keying score")
    twin.axhline(spec.threshold, color=COLOURS["purple"], lw=0.8, ls=":",
                 label=f"threshold z = {spec.threshold:.1f}")
    twin.set_ylabel("keying score, z", color=COLOURS["purple"])
    twin.tick_params(axis="y", colors=COLOURS["purple"])
    if result.carrier_hz is not None:
        bw = _detection_bandwidth_hz(result)
        if bw is not None:
            ax.axvspan((result.carrier_hz - bw / 2 - ref_hz) / scale,
                       (result.carrier_hz + bw / 2 - ref_hz) / scale,
                       color=COLOURS["sky"], alpha=0.5, lw=0)
        ax.axvline((result.carrier_hz - ref_hz) / scale, color=COLOURS["blue"], lw=1.2,
                   label=f"decoded carrier {result.carrier_hz:,.1f} Hz")
    others = [c for c in spec.carriers if result.carrier_hz is None
              or abs(c.frequency_hz - result.carrier_hz) > 1.5 * spec.bin_hz
              or c.channel != ch]
    if others:
        fo = np.array([(c.frequency_hz - ref_hz) / scale for c in others])
        lvl = np.interp(fo, f, spec.power_dbfs[ch])
        ax.plot(fo, lvl, ls="none", marker="v", ms=7, color=COLOURS["orange"],
                markeredgecolor=COLOURS["black"], label="keyed, not decoded")
        for c, x, y in zip(others, fo, lvl, strict=True):
            ax.annotate(f"{c.frequency_hz:,.0f} Hz" + (f", ch {c.channel}" if c.channel != ch
                                                        else ""),
                        (x, y), xytext=(0, 7), textcoords="offset points", fontsize=7,
                        ha="center", va="bottom", color=COLOURS["black"], gid="interferer")
    steady = _steady_peaks(spec, ch)
    if steady.size:
        lvl = spec.power_dbfs[ch, steady]
        f_hz = np.array([_peak_hz(spec, ch, int(b)) for b in steady])
        fs = (f_hz - ref_hz) / scale
        ax.plot(fs, lvl, ls="none", marker="s", ms=5, color=COLOURS["grey"],
                markeredgecolor=COLOURS["black"], label="steady, not keyed")
        for hz, x, y in zip(f_hz, fs, lvl, strict=True):
            ax.annotate(f"{hz:,.0f} Hz", (x, y), xytext=(0, 6),
                        textcoords="offset points", fontsize=7, ha="center", va="bottom",
                        color=COLOURS["grey"], gid="steady")
    # head room for the labels over the peaks
    top, bottom = float(np.max(spec.power_dbfs[ch])), float(np.min(spec.power_dbfs[ch]))
    ax.set_ylim(bottom - 1.0, top + 0.25 * (top - bottom) + 1.0)
    if not spec.carriers:
        ax.text(0.5, 0.95, "no bin's power is keyed", transform=ax.transAxes, ha="center",
                va="top", fontsize=9, color=COLOURS["vermillion"])
    lines = ax.get_legend_handles_labels()
    lines2 = twin.get_legend_handles_labels()
    # below the axis, where it hides no peak
    ax.legend(lines[0] + lines2[0], lines[1] + lines2[1], fontsize=7, ncol=2,
              loc="upper center", bbox_to_anchor=(0.5, -0.22), frameon=False)


def _steady_peaks(spec, ch: int, *, above_db: float = 10.0, n_max: int = 4) -> np.ndarray:
    """Bins of spectral peaks well over the floor whose power is not keyed (hum, carriers).

    A peak is a bin above both neighbours and ``above_db`` over the median bin; one within
    three bins of a keyed candidate belongs to that candidate (the search's own rule).
    """
    p = spec.power_dbfs[ch]
    if p.size < 5:
        return np.empty(0, dtype=int)
    peak = np.zeros(p.size, dtype=bool)
    peak[1:-1] = (p[1:-1] > p[:-2]) & (p[1:-1] >= p[2:])
    peak &= p > np.median(p) + above_db
    peak &= spec.score[ch] < spec.threshold
    peak[:2] = False  # DC and its leakage
    for c in spec.carriers:
        near = np.abs(spec.frequency_hz - c.frequency_hz) <= 3.5 * spec.bin_hz
        peak[near] = False
    bins = np.flatnonzero(peak)
    return np.sort(bins[np.argsort(-p[bins])][:n_max])


def _peak_hz(spec, ch: int, b: int) -> float:
    """Frequency of a spectral peak, interpolated by a parabola through log power, Hz."""
    p = spec.power_dbfs[ch]
    if 0 < b < p.size - 1:
        den = p[b - 1] - 2 * p[b] + p[b + 1]
        if den < 0:
            return float(spec.frequency_hz[b]
                         + np.clip(0.5 * (p[b - 1] - p[b + 1]) / den, -0.5, 0.5) * spec.bin_hz)
    return float(spec.frequency_hz[b])


def _draw_fine_spectrum(ax: Axes, result: Reception) -> None:
    base = result.baseband
    ax.set_title("around the carrier (Welch)", loc="left", fontsize=10)
    if base is None or base.samples.size < 64:
        ax.set_axis_off()
        ax.text(0.5, 0.5, "no carrier tuned", ha="center", va="center",
                transform=ax.transAxes, fontsize=10)
        return
    nper = int(min(2 ** math.ceil(math.log2(base.rate_hz)), 2 ** int(math.log2(base.samples.size))))
    freq, power = _welch(base.samples, base.rate_hz, nper)
    keep = np.abs(freq) <= base.half_band_hz
    floor = float(np.median(power[keep]))
    db = 10 * np.log10(np.maximum(power[keep], 1e-30) / max(floor, 1e-30))
    ax.plot(freq[keep], db, color=COLOURS["black"], lw=0.9, gid="welch")
    ax.set_xlabel(f"offset from the carrier ({base.carrier_hz:,.1f} Hz), Hz")
    ax.set_ylabel("power over noise floor, dB")
    bw = _detection_bandwidth_hz(result)
    if bw is not None:
        ax.axvspan(-bw / 2, bw / 2, color=COLOURS["sky"], alpha=0.5, lw=0,
                   label=f"detection band {bw:.1f} Hz")
    ax.axvline(0.0, color=COLOURS["blue"], lw=1.0, ls="-", label="decoded carrier")
    spec = result.spectrum
    if spec is not None:
        near = [c for c in spec.carriers
                if 1.5 * spec.bin_hz < abs(c.frequency_hz - base.carrier_hz)
                <= base.half_band_hz]
        for c in near:
            ax.axvline(c.frequency_hz - base.carrier_hz, color=COLOURS["orange"], lw=1.0,
                       ls="--")
        if near:
            ax.plot([], [], color=COLOURS["orange"], ls="--", label="keyed, not decoded")
    ax.set_xlim(-base.half_band_hz, base.half_band_hz)
    ax.legend(fontsize=7, ncol=2, loc="upper center", bbox_to_anchor=(0.5, -0.22),
              frameon=False)


def _welch(z: np.ndarray, rate_hz: float, nper: int) -> tuple[np.ndarray, np.ndarray]:
    """Mean Hann-windowed periodogram of complex samples, half-overlapping, in batches."""
    total = None
    n = 0
    for _, p in _frame_powers(z, nper, nper // 2):
        s = p.sum(axis=0, dtype=np.float64)
        total = s if total is None else total + s
        n += p.shape[0]
    freq = np.fft.fftshift(np.fft.fftfreq(nper, 1.0 / rate_hz))
    if total is None:
        return freq, np.zeros(nper)
    return freq, total / n


def _frame_powers(z: np.ndarray, nper: int, hop: int, *, frames_per_batch: int | None = None):
    """Yield (first frame index, power spectra (frames, nper), centred on 0 Hz)."""
    from scipy import fft

    if z.size < nper:
        return
    window = np.hanning(nper + 2)[1:-1].astype(np.float32)
    frames = np.lib.stride_tricks.sliding_window_view(z, nper)[::hop]  # a view, no copy
    batch = frames_per_batch or max(1, _BATCH_SAMPLES // nper)
    for b0 in range(0, frames.shape[0], batch):
        seg = frames[b0 : b0 + batch].astype(np.complex64) * window
        spec = fft.fftshift(fft.fft(seg, axis=-1), axes=-1)
        yield b0, (spec.real**2 + spec.imag**2)


def _frequency_axis(freq_hz: np.ndarray, carrier_hz: float | None) -> tuple[float, float, str]:
    """Reference, scale and unit for a frequency axis that stays readable at RF."""
    span = float(freq_hz[-1] - freq_hz[0]) if freq_hz.size > 1 else 1.0
    top = float(np.max(np.abs(freq_hz))) if freq_hz.size else 0.0
    ref = 0.0
    if top > 20 * span:  # absolute numbers would swamp the ticks
        ref = float(carrier_hz) if carrier_hz is not None else float(np.median(freq_hz))
    if span >= 20e3:
        return ref, 1e3, "kHz"
    return ref, 1.0, "Hz"


def _frequency_label(ref_hz: float, unit: str) -> str:
    if ref_hz == 0.0:
        return f"frequency, {unit}"
    return f"frequency from {ref_hz:,.1f} Hz, {unit}"


# ---------------------------------------------------------------------------------------
# Panel 2: waterfall


def _draw_waterfall(ax: Axes, result: Reception, fig: Figure) -> None:
    base = result.baseband
    ax.set_title("spectrogram near the carrier", loc="left", fontsize=10)
    ax.set_ylabel("offset from carrier, Hz")
    ax.tick_params(labelbottom=False)
    if base is None or base.samples.size < 64:
        ax.set_yticks([])
        return
    dot_s = _dot_s(result)
    # a frame about a dot long shows the keying; at least 32 samples for frequency detail
    nper = int(2 ** round(math.log2(min(max(dot_s * base.rate_hz, 32), 512))))
    nper = min(nper, 2 ** int(math.log2(base.samples.size)))
    hop = max(1, nper // 4)
    n_frames = 1 + (base.samples.size - nper) // hop
    per_col = max(1, -(-n_frames // MAX_COLUMNS))
    freq = np.fft.fftshift(np.fft.fftfreq(nper, 1.0 / base.rate_hz))
    keep = np.abs(freq) <= base.half_band_hz
    n_cols = -(-n_frames // per_col)
    image = np.zeros((n_cols, int(keep.sum())), dtype=np.float32)
    batch = per_col * max(1, (_BATCH_SAMPLES // nper) // per_col)
    for b0, p in _frame_powers(base.samples, nper, hop, frames_per_batch=batch):
        starts = np.arange(0, p.shape[0], per_col)
        image[b0 // per_col : b0 // per_col + starts.size] = (
            np.add.reduceat(p[:, keep], starts, axis=0)
            / np.diff(np.append(starts, p.shape[0]))[:, None])
    floor = float(np.median(image))
    db = 10 * np.log10(np.maximum(image, 1e-30) / max(floor, 1e-30))
    vmax = max(float(np.percentile(db, 99.9)), 10.0)
    t_first = base.start_s + (nper / 2) / base.rate_hz
    step_s = hop * per_col / base.rate_hz
    extent = (t_first - step_s / 2, t_first + (n_cols - 0.5) * step_s,
              float(freq[keep][0]), float(freq[keep][-1]))
    im = ax.imshow(db.T, origin="lower", aspect="auto", extent=extent, cmap="cividis",
                   vmin=-3.0, vmax=vmax, interpolation="nearest")
    fig.colorbar(im, ax=ax, label="dB over noise floor", pad=0.01, fraction=0.03)
    bw = _detection_bandwidth_hz(result)
    if bw is not None:
        for y in (-bw / 2, bw / 2):
            ax.axhline(y, color=COLOURS["orange"], lw=0.6, ls="--")
        ax.set_title(f"spectrogram near the carrier (dashed: detection band, {bw:.1f} Hz)",
                     loc="left", fontsize=10)


# ---------------------------------------------------------------------------------------
# Panel 3: envelope


def _draw_envelope(ax: Axes, result: Reception, t0: float, t1: float, *, characters: bool,
                   legend: bool = False, first: int = 0, last: int | None = None) -> None:
    env = result.envelope
    ax.set_xlabel("time from the start of the recording, s")
    ax.set_ylabel("envelope, full scale")
    if env is None or env.magnitude.size == 0:
        ax.set_yticks([])
        return
    x = env.magnitude
    i0 = max(int(math.floor((t0 - env.start_s) * env.rate_hz)), 0)
    i1 = min(int(math.ceil((t1 - env.start_s) * env.rate_hz)) + 1, x.size)
    if i1 - i0 < 2:
        return
    t, lo, hi = _min_max(x, i0, i1, env.start_s, env.rate_hz, MAX_COLUMNS)
    top = float(hi.max())
    if lo is None:
        ax.plot(t, hi, color=COLOURS["blue"], lw=0.8, label="envelope")
    else:
        ax.fill_between(t, lo, hi, color=COLOURS["blue"], lw=0.0, step="mid",
                        label="envelope (min to max)")
    marks = result.marks
    if marks is not None:
        lv = marks.levels
        if lv.time_s.size:
            k0 = max(int(np.searchsorted(lv.time_s, t0)) - 1, 0)
            k1 = int(np.searchsorted(lv.time_s, t1)) + 1
            sl = slice(k0, k1)
            # the decision held the first and last window's levels out to the ends
            # (linear interpolation between window centres, constant beyond them)
            t_end = env.start_s + (x.size - 1) / env.rate_hz
            tl = np.concatenate([[min(env.start_s, lv.time_s[0])], lv.time_s[sl],
                                 [max(t_end, lv.time_s[-1])]])

            def held(v: np.ndarray) -> np.ndarray:
                return np.concatenate([v[:1], v[sl], v[-1:]])

            ax.plot(tl, held(lv.noise), color=COLOURS["green"], ls="--", lw=1.2,
                    label="noise floor")
            ax.plot(tl, held(lv.mark), color=COLOURS["orange"], ls=":", lw=1.6,
                    label="mark level")
            ax.plot(tl, held(lv.threshold), color=COLOURS["black"], ls="-.", lw=1.0,
                    label="threshold")
            finite = lv.mark[sl][np.isfinite(lv.mark[sl])]
            if finite.size:
                top = max(top, float(finite.max()))
        inside = (marks.end_s > t0) & (marks.start_s < t1)
        a, b = _merge_spans(marks.start_s[inside], marks.end_s[inside],
                            (t1 - t0) / MAX_COLUMNS)
        if a.size:
            ax.broken_barh(list(zip(a, b - a, strict=True)), (0.0, 1.0),
                           transform=ax.get_xaxis_transform(), color=COLOURS["sky"],
                           alpha=0.35, lw=0, label="marks")
    ax.set_ylim(0.0, 1.35 * top if top > 0 else 1.0)
    if characters and result.characters:
        _write_characters(ax, result, first, len(result.characters) if last is None else last)
    if legend:
        # above the axes, beside the title, where no character is written
        ax.legend(fontsize=7, loc="lower right", bbox_to_anchor=(1.0, 1.0), ncol=5,
                  frameon=False, borderaxespad=0.1)


def _min_max(x: np.ndarray, i0: int, i1: int, start_s: float, rate_hz: float,
             n_cols: int) -> tuple[np.ndarray, np.ndarray | None, np.ndarray]:
    """The samples x[i0:i1] for drawing: themselves if few, else min and max per column.

    Returns times, minima (None when the samples are returned as they are) and maxima.
    """
    n = i1 - i0
    if n <= 2 * n_cols:
        return start_s + np.arange(i0, i1) / rate_hz, None, x[i0:i1]
    edges = i0 + (np.arange(n_cols + 1) * n) // n_cols
    seg = x[i0:i1]  # a view
    lo = np.minimum.reduceat(seg, edges[:-1] - i0)
    hi = np.maximum.reduceat(seg, edges[:-1] - i0)
    centre = start_s + 0.5 * (edges[:-1] + edges[1:] - 1) / rate_hz
    return centre, lo, hi


def _merge_spans(start: np.ndarray, end: np.ndarray, min_gap_s: float
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Join intervals closer than a drawing column, so no more spans than columns."""
    if start.size == 0:
        return start, end
    breaks = start[1:] - end[:-1] >= min_gap_s
    keep_start = np.concatenate([[True], breaks])
    keep_end = np.concatenate([breaks, [True]])
    return start[keep_start], end[keep_end]


def _write_characters(ax: Axes, result: Reception, first: int, last: int) -> None:
    chars = result.characters[first:last]
    size = 10 if len(chars) <= 32 else 8
    tx = ax.get_xaxis_transform()
    for c in chars:
        x = 0.5 * (c.start_s + c.end_s)
        if c.char == PLACEHOLDER:
            ax.text(x, 0.86, c.char, transform=tx, ha="center", va="bottom", fontsize=size + 1,
                    fontweight="bold", color=COLOURS["vermillion"], gid="character",
                    bbox={"boxstyle": "round,pad=0.15", "facecolor": "white",
                          "edgecolor": COLOURS["vermillion"], "lw": 1.0})
        else:
            ax.text(x, 0.86, c.char, transform=tx, ha="center", va="bottom", fontsize=size,
                    color=COLOURS["black"], gid="character",
                    fontstyle="italic" if c.confidence < LOW_CONFIDENCE else "normal")


# ---------------------------------------------------------------------------------------
# Panel 4: timing histograms


def _draw_histograms(ax_m: Axes, ax_s: Axes, result: Reception) -> None:
    syms = result.symbols
    ax_m.set_title("mark lengths", loc="left", fontsize=10)
    ax_s.set_title("space lengths", loc="left", fontsize=10)
    if syms is None or syms.n_marks == 0 or syms.dot_s is None:
        for ax in (ax_m, ax_s):
            ax.set_axis_off()
            ax.text(0.5, 0.5, "no marks classified", ha="center", va="center",
                    transform=ax.transAxes, fontsize=10)
        return
    local = syms.local_dot_s
    unit_ms = syms.dot_s * 1e3
    marks_u = (syms.end_s - syms.start_s) / local
    bins_m = np.linspace(0.0, 5.0, 51)
    ax_m.hist([np.clip(marks_u[~syms.is_dash], 0, 5), np.clip(marks_u[syms.is_dash], 0, 5)],
              bins=bins_m, stacked=True, color=[COLOURS["blue"], COLOURS["orange"]],
              label=["dots", "dashes"])
    for u in (1, 3):  # ITU-R M.1677-1 (2009): a dash is 3 dots
        ax_m.axvline(u, color=COLOURS["black"], ls=":", lw=1.0)
    ax_m.set_xticks([0, 1, 2, 3, 4, 5])
    ax_m.set_xlabel(f"length, dots (1 dot = {unit_ms:.1f} ms)")
    ax_m.set_ylabel("marks")
    timing = result.timing
    lines = []
    if timing.dash_dot_ratio is not None:
        lines.append(f"dash/dot {timing.dash_dot_ratio:.2f}")
    if timing.jitter_ms is not None:
        lines.append(f"jitter {timing.jitter_ms:.1f} ms ({timing.jitter_ms / unit_ms:.2f} dot)")
    if result.wpm is not None:
        lines.append(f"{result.wpm:.1f} WPM")
    ax_m.text(0.97, 0.95, "\n".join(lines), transform=ax_m.transAxes, ha="right", va="top",
              fontsize=8, bbox={"facecolor": "white", "edgecolor": COLOURS["grey"]},
              gid="timing")
    ax_m.legend(fontsize=7, loc="center right")
    if syms.gap_class.size:
        gaps_u = (syms.start_s[1:] - syms.end_s[:-1]) / (0.5 * (local[:-1] + local[1:]))
        pause = gaps_u > PAUSE_UNITS
        shown = gaps_u[~pause]
        cls = syms.gap_class[~pause]
        # Farnsworth spacing stretches the gaps past 7 dots: the axis follows them
        right = 10.0 if shown.size == 0 else float(
            np.clip(math.ceil(1.1 * shown.max()), 10.0, PAUSE_UNITS))
        data = [np.clip(shown[cls == k], 0, right) for k in (ELEMENT, CHARACTER, WORD)]
        ax_s.hist(data, bins=np.linspace(0.0, right, int(10 * right) + 1), stacked=True,
                  color=[COLOURS["blue"], COLOURS["orange"], COLOURS["green"]],
                  label=["element gaps", "character gaps", "word gaps"])
        if pause.any():
            ax_s.text(0.97, 0.55, f"{int(pause.sum())} longer than {PAUSE_UNITS:g} dots\n"
                      "(pauses) not shown", transform=ax_s.transAxes, ha="right", va="top",
                      fontsize=8)
        if result.farnsworth_wpm is not None and timing.char_gap_ms is not None:
            ax_s.axvline(timing.char_gap_ms / unit_ms, color=COLOURS["vermillion"], ls="--",
                         lw=1.0, label=f"Farnsworth, {result.farnsworth_wpm:.1f} WPM overall")
        ax_s.legend(fontsize=7, loc="upper right")
        ax_s.set_xticks([0, 1, 3, 5, 7] + list(range(10, int(right) + 1, 5)))
    for u in (1, 3, 7):  # ITU-R M.1677-1 (2009): gaps of 1, 3 and 7 dots
        ax_s.axvline(u, color=COLOURS["black"], ls=":", lw=1.0)
    ax_s.set_xlabel(f"length, dots (1 dot = {unit_ms:.1f} ms)")
    ax_s.set_ylabel("spaces")


# ---------------------------------------------------------------------------------------
# Helpers


def _dot_s(result: Reception) -> float:
    if result.symbols is not None and result.symbols.dot_s is not None:
        return float(result.symbols.dot_s)
    if result.timing.unit_ms is not None:
        return result.timing.unit_ms / 1e3
    if result.envelope is not None:
        return float(result.envelope.filter_s)
    return 0.06  # 20 WPM, only to size empty panels


def _detection_bandwidth_hz(result: Reception) -> float | None:
    if result.level.snr_bandwidth_hz is not None:
        return float(result.level.snr_bandwidth_hz)
    if result.envelope is not None:
        return float(result.envelope.noise_bandwidth_hz)
    return None


def _name(result: Reception) -> str:
    return _plain(Path(result.file).name or result.file)


def _plain(text: str) -> str:
    """Text as it is: a pair of dollar signs would otherwise start matplotlib's math."""
    return text.replace("$", r"\$")


def _extra_label(key: str, value: float) -> str:
    """A figure another stage added (``spark_rate_hz`` -> ``spark rate 612.0 Hz``)."""
    for suffix, unit in (("_hz", "Hz"), ("_s", "s"), ("_db", "dB")):
        if key.endswith(suffix):
            return f"{key[: -len(suffix)].replace('_', ' ')} {value:,.1f} {unit}"
    return f"{key.replace('_', ' ')} {value:g}"


def _title(result: Reception) -> str:
    def num(v: float | None, fmt: str, unit: str) -> str:
        return "n/a" if v is None else f"{v:{fmt}} {unit}"

    first = (f"{_name(result)}    carrier {num(result.carrier_hz, ',.1f', 'Hz')}    "
             f"C/N0 {num(result.cn0_dbhz, '.1f', 'dB-Hz')}    "
             f"SNR {num(result.snr_db, '.1f', 'dB')}"
             + (f" in {result.level.snr_bandwidth_hz:.1f} Hz"
                if result.level.snr_bandwidth_hz is not None else "")
             + f"    {num(result.wpm, '.1f', 'WPM')}"
             + (f" (overall {result.farnsworth_wpm:.1f})"
                if result.farnsworth_wpm is not None else "")
             + f"    {result.duration_s:.1f} s"
             + "".join(f"    {_extra_label(k, v)}" for k, v in result.extra.items()
                       if isinstance(v, (int, float)) and not isinstance(v, bool)))
    text = result.text
    if len(text) > MAX_TITLE_CHARS:
        text = text[: MAX_TITLE_CHARS - 1].rstrip() + "…"
    second = f"text: {_plain(text)}" if text else "text: (nothing decoded)"
    if result.n_unknown:
        second += f"    ({result.n_unknown} unknown, shown as {PLACEHOLDER})"
    if any(c.confidence < LOW_CONFIDENCE for c in result.characters):
        second += f"    (in italics: characters of confidence under {LOW_CONFIDENCE:g})"
    lines = [first, second]
    said = list(result.warnings) + list(result.notes)
    if said:
        lines.append(_plain("; ".join(said)))
    return "\n".join(lines)
