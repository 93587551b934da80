"""The report of a range-test campaign: ``report.html``, self-contained, with a path-loss fit.

:func:`write_report` turns the rows of a results store (:class:`okdecode.batch.Store`) into
one HTML file that needs nothing else: its plots are PNG images embedded as base64 data,
its style sheet is inline, it runs no script and loads nothing from a network, and it reads
on a phone as on a desktop. Every text that comes from a recording or a manifest (file
names, decoded text, metadata, error messages) is HTML-escaped.

Path loss
---------
The received carrier-to-noise density falls with distance ``d`` as
``C/N0(d) = C/N0(1 m) - n * 10 log10(d / 1 m)``: ``n = 2`` in free space (Friis: received
power goes as ``(lambda / 4 pi d)**2``, 20 dB per decade of distance) [1]_, more over the
ground and through clutter. :func:`fit_path_loss` fits ``C/N0 = a + b log10(d)`` by
ordinary least squares over the recordings whose C/N0 was measured and gives ``b`` in dB
per decade with its standard error [2]_; :func:`range_estimate_m` solves the fit for the
distance where it reaches the decoding threshold, an extrapolation beyond the measured
points that the report labels as such. Recordings too weak to decode have no measured
C/N0, so the fit rests on the stronger ones.

References
----------
.. [1] H. T. Friis, "A note on a simple transmission formula", Proc. IRE 34(5), 1946.
.. [2] N. R. Draper and H. Smith, "Applied Regression Analysis", 3rd ed., Wiley, 1998,
   ch. 1 (the standard error of a fitted slope).
"""

from __future__ import annotations

import base64
import html
import io
import math
import os
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from . import DEFAULT_DECODER, __version__

__all__ = ["DECODING_LIMIT_DBHZ", "THRESHOLD_CN0_DBHZ", "PathLossFit", "decoding_limit_dbhz",
           "fit_path_loss", "range_estimate_m", "render_report", "write_report"]

#: C/N0 at which each of okdecode's decoders reaches 5 % character error rate at 20 WPM,
#: carrier and speed unknown, dB-Hz: the 5 % crossings measured by bench/sensitivity.py
#: (20 messages of five groups a point, 8 kHz synthetic recordings) with okdecode 0.1.0,
#: 24.33 for the sequence decoder and 26.97 for the threshold decoder. Regression
#: figures of these decoders, not an outside truth.
DECODING_LIMIT_DBHZ = {"sequence": 24.3, "threshold": 27.0}
#: The limit of the default decoder.
THRESHOLD_CN0_DBHZ = DECODING_LIMIT_DBHZ[DEFAULT_DECODER]


def decoding_limit_dbhz(rows: list[dict]) -> float:
    """The C/N0 a campaign's range estimate aims at: its decoders' highest limit, dB-Hz.

    Rows made by different decoders (a manifest may name one per recording) take the
    least sensitive one's limit, so the estimate is not stretched by the better one.
    """
    used = {r.get("decoder") for r in rows} & set(DECODING_LIMIT_DBHZ)
    return max((DECODING_LIMIT_DBHZ[d] for d in used), default=THRESHOLD_CN0_DBHZ)


@dataclass(frozen=True)
class PathLossFit:
    """A least-squares fit of ``C/N0 = intercept + slope * log10(d / 1 m)``."""

    slope_db_per_decade: float  # b, dB per decade of distance (negative: loss)
    slope_stderr_db: float | None  # standard error of b; None with fewer than 3 points
    intercept_dbhz: float  # a, the fit's C/N0 at 1 m, dB-Hz
    residual_db: float | None  # standard deviation of the residuals (n - 2 dof), dB
    n_points: int
    min_distance_m: float
    max_distance_m: float

    @property
    def path_loss_exponent(self) -> float:
        """``n`` of ``d**-n``: 2 in free space."""
        return -self.slope_db_per_decade / 10.0

    def cn0_dbhz(self, distance_m: float | np.ndarray) -> float | np.ndarray:
        """The fit's C/N0 at a distance, dB-Hz."""
        return self.intercept_dbhz + self.slope_db_per_decade * np.log10(distance_m)


def fit_path_loss(distance_m, cn0_dbhz) -> PathLossFit | None:
    """Fit C/N0 against the logarithm of distance by ordinary least squares.

    Parameters
    ----------
    distance_m : array_like, shape (n,)
        Distances, m; entries that are None, not finite or not > 0 are left out with
        their C/N0.
    cn0_dbhz : array_like, shape (n,)
        Measured C/N0, dB-Hz; None where not measured.

    Returns
    -------
    PathLossFit or None
        None when fewer than two distinct distances remain.

    Notes
    -----
    With ``x = log10(d)``, ``b = Sxy / Sxx``, ``a = mean(y) - b mean(x)``, and the standard
    error of ``b`` is ``s / sqrt(Sxx)`` with ``s**2`` the residual sum of squares over
    ``n - 2`` (Draper and Smith, ch. 1).

    Examples
    --------
    >>> fit = fit_path_loss([10, 100, 1000], [60.0, 40.0, 20.0])
    >>> round(fit.slope_db_per_decade, 6), round(fit.intercept_dbhz, 6)
    (-20.0, 80.0)
    """
    pairs = [(float(d), float(c)) for d, c in zip(distance_m, cn0_dbhz, strict=True)
             if d is not None and c is not None and math.isfinite(float(d)) and float(d) > 0
             and math.isfinite(float(c))]
    if len({d for d, _ in pairs}) < 2:
        return None
    d = np.array([p[0] for p in pairs])
    y = np.array([p[1] for p in pairs])
    x = np.log10(d)
    sxx = float(((x - x.mean()) ** 2).sum())
    b = float(((x - x.mean()) * (y - y.mean())).sum()) / sxx
    a = float(y.mean() - b * x.mean())
    n = d.size
    stderr = resid = None
    if n > 2:
        s2 = float(((y - a - b * x) ** 2).sum()) / (n - 2)
        resid = math.sqrt(s2)
        stderr = math.sqrt(s2 / sxx)
    return PathLossFit(slope_db_per_decade=b, slope_stderr_db=stderr, intercept_dbhz=a,
                       residual_db=resid, n_points=n, min_distance_m=float(d.min()),
                       max_distance_m=float(d.max()))


def range_estimate_m(fit: PathLossFit | None, threshold_dbhz: float = THRESHOLD_CN0_DBHZ
                     ) -> float | None:
    """Distance at which the fitted C/N0 falls to the threshold, m (an extrapolation).

    Returns None when there is no fit or it does not fall with distance.

    Examples
    --------
    >>> fit = fit_path_loss([10, 100, 1000], [60.0, 40.0, 20.0])
    >>> round(range_estimate_m(fit, 30.0), 3)
    316.228
    """
    if fit is None or not fit.slope_db_per_decade < 0:
        return None
    return float(10 ** ((threshold_dbhz - fit.intercept_dbhz) / fit.slope_db_per_decade))


# --- figures --------------------------------------------------------------------------------


def _png(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _new_figure():
    from matplotlib.figure import Figure

    fig = Figure(figsize=(7.0, 4.0), layout="constrained")
    return fig, fig.add_subplot()


def _log_distance_axis(ax) -> None:
    """A logarithmic distance axis labelled 50 m, 100 m, 200 m, 500 m, 1 km, ..."""
    from matplotlib import ticker

    ax.set_xscale("log")
    ax.xaxis.set_major_locator(ticker.LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
    ax.xaxis.set_major_formatter(ticker.FuncFormatter(lambda v, _: _distance(v)))
    ax.xaxis.set_minor_formatter(ticker.NullFormatter())
    ax.set_xlabel("distance")


def _cn0_figure(rows: list[dict], fit: PathLossFit | None, threshold_dbhz: float,
                range_m: float | None) -> str | None:
    pts = [(r["distance_m"], r["cn0_dbhz"], _ok(r)) for r in rows
           if r["distance_m"] and r["distance_m"] > 0 and r["cn0_dbhz"] is not None]
    if not pts:
        return None
    fig, ax = _new_figure()
    good = [(d, c) for d, c, ok in pts if ok]
    bad = [(d, c) for d, c, ok in pts if not ok]
    if good:
        ax.plot(*zip(*good, strict=True), "o", color="tab:blue", label="received")
    if bad:
        ax.plot(*zip(*bad, strict=True), "o", mfc="none", color="tab:red",
                label="not received")
    ax.axhline(threshold_dbhz, color="0.4", ls="--", lw=1,
               label=f"decoding threshold {threshold_dbhz:g} dB-Hz")
    if fit is not None:
        hi = max(fit.max_distance_m, range_m or 0.0)
        hi = min(hi, 30 * fit.max_distance_m)
        dd = np.geomspace(fit.min_distance_m, hi, 100)
        err = (f" ± {fit.slope_stderr_db:.1f}" if fit.slope_stderr_db is not None else "")
        ax.plot(dd, fit.cn0_dbhz(dd), "-", color="tab:green",
                label=f"fit: {fit.slope_db_per_decade:.1f}{err} dB/decade")
        if range_m is not None and range_m <= hi:
            ax.axvline(range_m, color="tab:green", ls=":", lw=1.2,
                       label=f"extrapolated range ≈ {_distance(range_m)}")
    _log_distance_axis(ax)
    ax.set_ylabel("C/N0, dB-Hz")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8)
    return _png(fig)


def _cer_figure(rows: list[dict]) -> str | None:
    pts = [(r["distance_m"], r["cer"], _ok(r)) for r in rows
           if r["distance_m"] and r["distance_m"] > 0 and r["cer"] is not None]
    if not pts:
        return None
    fig, ax = _new_figure()
    for ok, style, label in ((True, {"color": "tab:blue"}, "received"),
                             (False, {"color": "tab:red", "mfc": "none"}, "not received")):
        sel = [(d, c) for d, c, o in pts if o == ok]
        if sel:
            ax.plot(*zip(*sel, strict=True), "o", label=label, **style)
    _log_distance_axis(ax)
    ax.set_ylabel("character error rate")
    ax.set_ylim(-0.05, max(1.05, max(c for _, c, _ in pts) + 0.05))
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8)
    return _png(fig)


_TIMING_SERIES = (("dot_ms", "dot_spread_ms", "dot", "o"),
                  ("dash_ms", "dash_spread_ms", "dash", "s"),
                  ("element_gap_ms", None, "element gap", "^"),
                  ("char_gap_ms", None, "character gap", "v"),
                  ("word_gap_ms", None, "word gap", "D"))


def _timing_figure(rows: list[dict]) -> str | None:
    sel = [r for r in rows if r["dot_ms"] is not None]
    if not sel:
        return None
    fig, ax = _new_figure()
    x = np.arange(len(sel))
    for i, (key, spread, label, marker) in enumerate(_TIMING_SERIES):
        y = np.array([np.nan if r[key] is None else r[key] for r in sel])
        if np.isnan(y).all():
            continue
        err = (None if spread is None else
               np.array([0.0 if r[spread] is None else r[spread] for r in sel]))
        ax.errorbar(x + (i - 2) * 0.07, y, yerr=err, fmt=marker, ms=4, capsize=2,
                    label=label)
    ax.set_xticks(x, [_distance(r["distance_m"]) if r["distance_m"] is not None
                      else str(i + 1) for i, r in enumerate(sel)],
                  rotation=45 if len(sel) > 8 else 0, fontsize=8)
    ax.set_xlabel("recording (by distance)")
    ax.set_ylabel("duration, ms (bars: spread)")
    ax.set_yscale("log")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8, ncol=3)
    return _png(fig)


# --- text -----------------------------------------------------------------------------------


def _ok(row: dict) -> bool:
    """Received: verified against the expected text, or (without one) anything decoded."""
    if row["status"] != "ok":
        return False
    if row["received"] is not None:
        return bool(row["received"])
    return bool(row["text"])


def _distance(d: float | None) -> str:
    if d is None:
        return "—"
    return f"{d / 1000:.3g} km" if d >= 1000 else f"{d:.3g} m"


def _num(v, spec: str) -> str:
    return "—" if v is None else format(v, spec)


def summarise(rows: list[dict], *, threshold_dbhz: float | None = None) -> dict:
    """The campaign's figures: counts, the furthest complete message, the path-loss fit.

    ``threshold_dbhz`` is the C/N0 the range estimate aims at; by default the decoders'
    limit (:func:`decoding_limit_dbhz`).
    """
    if threshold_dbhz is None:
        threshold_dbhz = decoding_limit_dbhz(rows)
    verified = [r for r in rows if r["received"] is not None]
    received = [r for r in verified if r["received"]]
    far = max((r["distance_m"] for r in received if r["distance_m"] is not None),
              default=None)
    fit = fit_path_loss([r["distance_m"] for r in rows], [r["cn0_dbhz"] for r in rows])
    got_cn0 = [r["cn0_dbhz"] for r in received if r["cn0_dbhz"] is not None]
    return {
        "n_recordings": len(rows),
        "n_failed": sum(r["status"] == "failed" for r in rows),
        "n_decoded": sum(bool(r["text"]) for r in rows),
        "n_verified": len(verified),
        "n_received": len(received),
        "furthest_received_m": far,
        "fit": fit,
        "threshold_dbhz": threshold_dbhz,
        "range_m": range_estimate_m(fit, threshold_dbhz),
        "weakest_received_dbhz": min(got_cn0) if got_cn0 else None,
        "n_detected": sum(bool(r["detected"]) for r in rows),
        "n_detection": sum(r["detected"] is not None for r in rows),
    }


_CSS = """
:root { --fg: #1b1f24; --muted: #57606a; --line: #d0d7de; --ok: #1a7f37; --bad: #cf222e; }
* { box-sizing: border-box; }
body { font: 16px/1.45 system-ui, sans-serif; color: var(--fg); margin: 0 auto;
       max-width: 1100px; padding: 1rem; }
h1 { font-size: 1.5rem; margin: 0 0 .25rem; } h2 { font-size: 1.2rem; margin-top: 2rem; }
.muted { color: var(--muted); font-size: .9rem; }
.cards { display: flex; flex-wrap: wrap; gap: .75rem; margin: 1rem 0; }
.card { flex: 1 1 10rem; border: 1px solid var(--line); border-radius: 8px; padding: .6rem .8rem; }
.card b { display: block; font-size: 1.35rem; }
#figures { display: grid; grid-template-columns: repeat(auto-fit, minmax(min(100%, 30rem), 1fr));
  gap: 0 1.5rem; } #figures h2, #figures > p { grid-column: 1 / -1; }
figure { margin: 1rem 0; } figure img { width: 100%; max-width: 770px; height: auto;
  border: 1px solid var(--line); border-radius: 6px; }
figcaption { color: var(--muted); font-size: .9rem; }
.scroll { overflow-x: auto; -webkit-overflow-scrolling: touch; }
table { border-collapse: collapse; width: 100%; font-size: .9rem; }
th, td { border-bottom: 1px solid var(--line); padding: .35rem .5rem; text-align: left;
         vertical-align: top; }
td.n { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
.yes { color: var(--ok); font-weight: 600; } .no { color: var(--bad); font-weight: 600; }
.err { color: var(--bad); font-size: .85rem; } code { word-break: break-all; }
.extrapolation { border-left: 4px solid #bf8700; padding: .4rem .8rem; background: #fff8c5; }
@media (max-width: 600px) {
  body { padding: .5rem; font-size: 15px; } .card b { font-size: 1.1rem; }
  th, td { padding: .25rem .3rem; } table { font-size: .8rem; }
}
"""


def _e(value) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def _received_cell(r: dict) -> str:
    if r["status"] != "ok":
        return '<span class="no">failed</span>'
    if r["received"] is None:
        return '<span class="muted">no expected text</span>'
    return '<span class="yes">yes</span>' if r["received"] else '<span class="no">no</span>'


def _detected_cell(r: dict) -> str:
    if r["detected"] is None:
        return '<span class="muted">—</span>'
    det = (r.get("verification") or {}).get("detection") or {}
    pfa = det.get("false_alarm_probability")
    tail = f' <span class="muted">(false alarm {pfa:.1g})</span>' if isinstance(
        pfa, (int, float)) else ""
    word = '<span class="yes">yes</span>' if r["detected"] else '<span class="no">no</span>'
    return word + tail


def _row_html(r: dict) -> str:
    name = _e(r["file"])
    if r.get("figure"):
        name = f'<a href="{_e(r["figure"])}">{name}</a>'
    meta = r.get("metadata") or {}
    details = "; ".join(f"{_e(k)}: {_e(v)}" for k, v in sorted(meta.items()) if v != "")
    problems = []
    if r["error"]:
        problems.append(_e(r["error"]))
    problems += [_e(w) for w in (r.get("warnings") or [])]
    text = _e(r["text"]) if r["text"] else '<span class="muted">(nothing decoded)</span>'
    cer = "—" if r["cer"] is None else f"{100 * r['cer']:.1f} %"
    return (f"<tr><td><code>{name}</code>"
            + (f'<div class="muted">{details}</div>' if details else "")
            + f'</td><td class="n">{_e(_distance(r["distance_m"]))}</td>'
            f"<td>{_received_cell(r)}</td><td>{_detected_cell(r)}</td>"
            f'<td class="n">{cer}</td>'
            f'<td class="n">{_num(r["cn0_dbhz"], ".1f")}</td>'
            f'<td class="n">{_num(r["snr_db"], ".1f")}</td>'
            f'<td class="n">{_num(r["wpm"], ".1f")}</td>'
            f'<td class="n">{_num(r["duration_s"], ".1f")}</td>'
            f"<td>{text}</td>"
            f'<td class="err">{"<br>".join(problems)}</td></tr>')


def render_report(rows: list[dict], *, title: str = "okdecode range test",
                  threshold_dbhz: float | None = None) -> str:
    """The report as one HTML document (see the module notes).

    Parameters
    ----------
    rows : list of dict
        Rows of a results store (:meth:`okdecode.batch.Store.rows`).
    title : str
        The page's heading (escaped).
    threshold_dbhz : float, optional
        The decoding threshold the range estimate aims at, dB-Hz; by default the limit
        of the decoders that made the rows (:func:`decoding_limit_dbhz`).
    """
    s = summarise(rows, threshold_dbhz=threshold_dbhz)
    threshold_dbhz = s["threshold_dbhz"]
    fit, range_m = s["fit"], s["range_m"]
    if s["n_verified"]:
        received = f"{s['n_received']} of {s['n_verified']}"
    else:
        received = f"{s['n_decoded']} decoded (no expected text)"
    cards = [("recordings", str(s["n_recordings"])), ("complete message", received),
             ("furthest complete message", _distance(s["furthest_received_m"])),
             ("failed to process", str(s["n_failed"]))]
    if fit is not None:
        err = f" ± {fit.slope_stderr_db:.1f}" if fit.slope_stderr_db is not None else ""
        cards.append(("path-loss slope", f"{fit.slope_db_per_decade:.1f}{err} dB/decade"))
    if range_m is not None:
        cards.append(("estimated range (extrapolated)", _distance(range_m)))
    if s["n_detection"]:
        cards.append(("known message detected", f"{s['n_detected']} of {s['n_detection']}"))
    parts = [
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>",
        f"<header><h1>{_e(title)}</h1><p class=\"muted\">okdecode {_e(__version__)}, "
        f"{_e(datetime.now(timezone.utc).strftime('%Y-%m-%d %H:%M UTC'))}</p></header>",
        '<section id="summary"><div class="cards">',
        *(f'<div class="card"><span class="muted">{_e(k)}</span><b>{_e(v)}</b></div>'
          for k, v in cards),
        "</div>",
    ]
    if fit is not None:
        err = (f" ± {fit.slope_stderr_db:.1f} dB (standard error)"
               if fit.slope_stderr_db is not None else " (two points: no uncertainty)")
        text = (f"Least-squares fit over {fit.n_points} recordings with a measured C/N0, "
                f"{_distance(fit.min_distance_m)} to {_distance(fit.max_distance_m)}: "
                f"C/N0 falls {-fit.slope_db_per_decade:.1f}{err} per decade of distance "
                f"(free space: 20 dB per decade), residual spread "
                f"{_num(fit.residual_db, '.1f')} dB.")
        if s["weakest_received_dbhz"] is not None:
            text += (" The weakest recording with a complete message had a C/N0 of "
                     f"{s['weakest_received_dbhz']:.1f} dB-Hz.")
        parts.append(f"<p>{_e(text)}</p>")
        if range_m is not None:
            parts.append(
                '<p class="extrapolation"><b>Extrapolation.</b> '
                + _e(f"The fit reaches the decoding threshold of {threshold_dbhz:g} dB-Hz "
                     f"(about 5 % character errors at 20 WPM) at about {_distance(range_m)}. "
                     "This is an estimate beyond the measured points, not a measurement; "
                     "recordings too weak to decode have no C/N0 and are not in the fit.")
                + "</p>")
    parts.append("</section>")
    figs = [("cn0", "C/N0 against distance, with the least-squares path-loss fit and the "
             "decoding threshold", _cn0_figure(rows, fit, threshold_dbhz, range_m)),
            ("cer", "Character error rate against distance", _cer_figure(rows)),
            ("timing", "Keying timing per recording: dots, dashes and gaps (bars: spread)",
             _timing_figure(rows))]
    parts.append('<section id="figures"><h2>Figures</h2>')
    for ident, caption, png in figs:
        if png is None:
            parts.append(f'<p class="muted">{_e(caption)}: no data to plot.</p>')
            continue
        parts.append(f'<figure id="fig-{ident}"><img alt="{_e(caption)}" '
                     f'src="data:image/png;base64,{png}"><figcaption>{_e(caption)}'
                     "</figcaption></figure>")
    parts.append("</section>")
    parts.append('<section id="recordings"><h2>Recordings</h2><div class="scroll"><table>'
                 "<thead><tr><th>file</th><th>distance</th><th>received</th>"
                 "<th>known message detected</th><th>CER</th>"
                 "<th>C/N0, dB-Hz</th><th>SNR, dB</th><th>WPM</th><th>duration, s</th>"
                 "<th>text</th><th>errors and warnings</th></tr></thead><tbody>")
    parts.extend(_row_html(r) for r in rows)
    parts.append("</tbody></table></div></section></body></html>")
    return "\n".join(parts)


def write_report(rows: list[dict], path: str | os.PathLike, **options) -> Path:
    """Write :func:`render_report` to a file (atomically: a reader never sees half of it).

    Returns
    -------
    Path
        The file written.
    """
    p = Path(path)
    tmp = p.with_name(p.name + ".tmp")
    tmp.write_text(render_report(rows, **options), encoding="utf-8")
    os.replace(tmp, p)
    return p
