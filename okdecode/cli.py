"""The ``okdecode`` command line (the only importer of click).

Each command works file by file: an :class:`~okdecode.errors.OkDecodeError` becomes one
line on stderr naming the file, the other files go on, and the exit status is 2 when
any input was bad. Heavy modules are imported inside the commands, so ``okdecode
--help`` starts fast.
"""

from __future__ import annotations

import json
import sys

import click

from . import DECODERS, DEFAULT_DECODER, __version__
from .errors import OkDecodeError

_CONTEXT = {"help_option_names": ["-h", "--help"], "max_content_width": 100}


def fail_line(source: str, err: BaseException) -> str:
    """One line for an error: okdecode's own as they are, anything else flagged."""
    if isinstance(err, OkDecodeError):
        return str(err)
    return f"{source}: unexpected {type(err).__name__} ({err}); please report this"


def _echo_err(line: str) -> None:
    click.echo(f"okdecode: {line}", err=True)


class Progress:
    """A one-line progress count on stderr when it is a terminal; silent otherwise."""

    def __init__(self, label: str, total: int | None, *, enabled: bool | None = None):
        self.label, self.total, self.done = label, total, 0
        self.enabled = sys.stderr.isatty() if enabled is None else enabled
        self._shown = -1

    def __call__(self, n: int) -> None:
        if not self.enabled or not self.total:
            return
        self.done += n
        # two passes over the samples (search, then tuning): count to 2 * total
        pct = int(100 * self.done / (2 * self.total))
        if pct != self._shown:
            self._shown = pct
            click.echo(f"\r{self.label}: {min(pct, 100):3d} %", err=True, nl=False)

    def close(self) -> None:
        if self.enabled and self._shown >= 0:
            click.echo("\r" + " " * (len(self.label) + 8) + "\r", err=True, nl=False)


@click.group(context_settings=_CONTEXT)
@click.version_option(__version__, prog_name="okdecode")
def main() -> None:
    """Receive and decode on-off keyed recordings: audio, I/Q and oscilloscope traces."""


def _fmt(v, spec: str, unit: str = "") -> str:
    return "n/a" if v is None else f"{v:{spec}}{unit}"


def summary(result) -> str:
    """A short human summary of a Reception."""
    d = result.to_dict()
    t = d["timing"]
    lines = [d["file"], f"  text     {d['text'] or '(nothing decoded)'}"]
    if d["carrier_hz"] is not None:
        chan = f" (channel {d['channel']})" if d["channel"] is not None else ""
        lines.append(
            f"  carrier  {_fmt(d['carrier_hz'], '.1f', ' Hz')}{chan}   speed "
            f"{_fmt(d['wpm'], '.1f', ' WPM')}"
            + (f" (Farnsworth {d['farnsworth_wpm']:.1f} WPM overall)"
               if d["farnsworth_wpm"] else ""))
        lines.append(
            f"  level    C/N0 {_fmt(d['cn0_dbhz'], '.1f', ' dB-Hz')}   SNR "
            f"{_fmt(d['snr_db'], '.1f', ' dB')} in {_fmt(d['snr_bandwidth_hz'], '.1f', ' Hz')}"
            f"   signal {_fmt(d['signal_dbfs'], '.1f', ' dBFS')}")
    if t["dot_ms"] is not None or t["dash_ms"] is not None:
        lines.append(
            f"  timing   dot {_fmt(t['dot_ms'], '.1f', ' ms')}   dash "
            f"{_fmt(t['dash_ms'], '.1f', ' ms')}   dash/dot {_fmt(t['dash_dot_ratio'], '.2f')}"
            f"   gaps {_fmt(t['element_gap_ms'], '.0f')}/{_fmt(t['char_gap_ms'], '.0f')}/"
            f"{_fmt(t['word_gap_ms'], '.0f')} ms   jitter {_fmt(t['jitter_ms'], '.1f', ' ms')}")
    if d["n_unknown"]:
        lines.append(f"  unknown  {d['n_unknown']} character(s) shown as '*'")
    for note in d["notes"]:
        lines.append(f"  note     {note}")
    for w in d["warnings"]:
        lines.append(f"  warning  {w}")
    return "\n".join(lines)


def _per_file(out: str, path: str, n_files: int) -> str:
    """OUT itself for one output; OUT-<stem>.<ext> for each of several."""
    if n_files == 1:
        return out
    from pathlib import Path

    o = Path(out)
    suffix = "".join(o.suffixes) or o.suffix  # keep ".sigmf-meta" whole
    stem = o.name[: len(o.name) - len(suffix)] if suffix else o.name
    tag = Path(path).name.split(".")[0] + (path.split("#")[1] if "#" in path else "")
    return str(o.with_name(f"{stem}-{tag}{suffix}"))


def _receiver_options(command):
    """The options every command that decodes takes (decode, verify), in one place."""
    for option in reversed([
        click.option("--carrier", type=float, default=None, metavar="HZ",
                     help="Carrier frequency (absolute). Default: found from the spectrum."),
        click.option("--channel", default=None, metavar="N|NAME",
                     help="Channel index, or a trace's column name. Default: the channel "
                          "with the strongest keyed signal."),
        click.option("--wpm", type=float, default=None, metavar="N",
                     help="Sending speed, if known. Default: measured."),
        click.option("--decoder", type=click.Choice(list(DECODERS)),
                     default=DEFAULT_DECODER, show_default=True,
                     help="sequence: the soft-decision sequence decoder, deciding the "
                          "whole message at once; threshold: the adaptive threshold alone, "
                          "element by element (faster, about 3 dB less sensitive)."),
        click.option("--rate", type=float, default=None, metavar="HZ",
                     help="Sample rate, for raw I/Q, NumPy arrays and traces without a time "
                          "column."),
        click.option("--iq-format", default=None, metavar="TYPE",
                     help="Raw I/Q sample type by SigMF name: cu8, ci8, ci16_le, cf32_le, ..."),
        click.option("--center-hz", type=float, default=None, metavar="HZ",
                     help="I/Q: the frequency of baseband 0 Hz, so reported frequencies are "
                          "absolute."),
    ]):
        command = option(command)
    return command


def _reader_options(rate, iq_format, center_hz) -> dict:
    out = {}
    if rate is not None:
        out["rate_hz"] = rate
    if iq_format is not None:
        out["iq_format"] = iq_format
    if center_hz is not None:
        out["center_hz"] = center_hz
    return out


@main.command(context_settings=_CONTEXT)
@click.argument("files", nargs=-1, required=True, type=click.Path())
@_receiver_options
@click.option("--all-carriers", is_flag=True,
              help="Decode every keyed carrier found, each reported on its own, in the "
                   "order they were heard.")
@click.option("--annotate", "annotate_path", default=None, type=click.Path(),
              metavar="OUT.sigmf-meta",
              help="SigMF or raw I/Q input: write a copy of its metadata with one annotation "
                   "per decoded character (the input is never changed).")
@click.option("--plot", "plot_path", default=None, type=click.Path(), metavar="OUT",
              help="Write a figure of the reception (.png, .svg or .pdf); with several files "
                   "each gets its own, OUT-<name>.png.")
@click.option("--json", "as_json", is_flag=True,
              help="One JSON object per file (JSON Lines) instead of the summary.")
def decode(files, carrier, channel, wpm, decoder, all_carriers, annotate_path, rate, iq_format,
           center_hz, plot_path, as_json):
    """Decode keyed recordings and report text, strength and timing."""
    from .capture import open_capture
    from .receiver import decode_all_carriers, decode_capture

    status = 0
    for path in files:
        progress = Progress(path, None)
        try:
            options = _reader_options(rate, iq_format, center_hz)
            index = _channel_index(channel)
            if channel is not None and index is None:
                options["columns"] = channel  # a trace's column, by name
            capture = open_capture(path, **options)
            progress.total = capture.n_samples
            if all_carriers:
                if carrier is not None:
                    raise click.UsageError("--all-carriers finds the carriers; drop --carrier")
                results = decode_all_carriers(capture, channel=index, wpm=wpm,
                                              decoder=decoder, progress=progress)
            else:
                results = [decode_capture(capture, carrier_hz=carrier, channel=index, wpm=wpm,
                                          decoder=decoder, progress=progress)]
            for k, result in enumerate(results):
                name = path if len(results) == 1 else f"{path}#{k}"
                n_outputs = len(files) * len(results)
                if plot_path is not None:
                    from .plot import write_figure

                    write_figure(result, _per_file(plot_path, name, n_outputs))
                if annotate_path is not None:
                    from .capture.sigmf_io import write_annotations

                    write_annotations(path, _per_file(annotate_path, name, n_outputs),
                                      result.characters, rate_hz=rate, iq_format=iq_format,
                                      center_hz=center_hz, carrier_hz=result.carrier_hz,
                                      bandwidth_hz=result.level.snr_bandwidth_hz)
        except click.UsageError:
            raise
        except Exception as err:  # noqa: BLE001 - one line per file, the others go on
            progress.close()
            _echo_err(fail_line(path, err))
            status = 2
            continue
        progress.close()
        for result in results:
            if as_json:
                click.echo(json.dumps(result.to_dict(), ensure_ascii=False))
            else:
                click.echo(summary(result))
    sys.exit(status)


def _channel_index(channel: str | None) -> int | None:
    """--channel as an index, or None when it names a trace's column (or is absent)."""
    if channel is None:
        return None
    try:
        return int(channel)
    except ValueError:
        return None


@main.command(context_settings=_CONTEXT)
@click.argument("out", type=click.Path())
@click.option("--text", "message", required=True, help="The message to key.")
@click.option("--wpm", type=float, default=20.0, show_default=True, help="Overall speed, WPM.")
@click.option("--char-wpm", type=float, default=None,
              help="Character speed for Farnsworth spacing (above --wpm).")
@click.option("--carrier", type=float, default=700.0, show_default=True, metavar="HZ")
@click.option("--rate", type=float, default=8000.0, show_default=True, metavar="HZ")
@click.option("--cn0", type=float, default=None, metavar="DBHZ",
              help="Carrier to noise density, dB-Hz. Default: no noise.")
@click.option("--jitter", type=float, default=0.0, show_default=True,
              help="Relative spread of element lengths.")
@click.option("--dash-dot-ratio", type=float, default=3.0, show_default=True)
@click.option("--weight", type=float, default=0.0, show_default=True,
              help="Fraction of a dot added to marks and taken from spaces.")
@click.option("--fading-db", type=float, default=0.0, show_default=True)
@click.option("--drift-hz", type=float, default=0.0, show_default=True)
@click.option("--hum-db", type=float, default=None, help="Mains hum level re the carrier, dB.")
@click.option("--clicks-per-s", type=float, default=0.0, show_default=True)
@click.option("--iq", is_flag=True, help="Complex baseband (write a .npy file).")
@click.option("--seed", type=int, default=0, show_default=True)
def synth(out, message, wpm, char_wpm, carrier, rate, cn0, jitter, dash_dot_ratio, weight,
          fading_db, drift_hz, hum_db, clicks_per_s, iq, seed):
    """Write a synthetic keyed recording (WAV, FLAC, OGG or NumPy .npy)."""
    from .synth import synth_file

    try:
        truth = synth_file(out, message, wpm=wpm, char_wpm=char_wpm, carrier_hz=carrier,
                           rate_hz=rate, cn0_dbhz=cn0, jitter=jitter,
                           dash_dot_ratio=dash_dot_ratio, weight=weight, fading_db=fading_db,
                           drift_hz=drift_hz, hum_db=hum_db, clicks_per_s=clicks_per_s,
                           iq=iq, seed=seed)
    except Exception as err:  # noqa: BLE001
        _echo_err(fail_line(out, err))
        sys.exit(2)
    click.echo(f"{out}: {truth.text!r}, {truth.duration_s:.2f} s at {rate:g} Hz")


# Commands of later stages register below, each in its own block.
# --- verify ---
def _verify_summary(v) -> str:
    """The human report of one Verification: a summary line, then the details."""
    d = v.to_dict()
    n_diff = len(d["differences"])
    copies = f"{d['copies']} intact cop{'y' if d['copies'] == 1 else 'ies'}"
    verdict = "received" if d["received"] else "NOT received"
    lines = [f"{d['file']}: {verdict} (CER {d['cer']:.3f}, {n_diff} difference"
             f"{'' if n_diff == 1 else 's'}, {copies})"]
    lines.append(f"  expected  {d['expected']}")
    lines.append(f"  text      {d['text'] or '(nothing decoded)'}")
    if d["best_copy"]["text"] and d["best_copy"]["text"] != d["text"]:
        lines.append(f"  best copy {d['best_copy']['text']}")
    shown = d["differences"] if d["text"] else []  # with nothing decoded, all is missing
    for diff in shown[:40]:
        at = "   n/a  " if diff["time_s"] is None else f"{diff['time_s']:8.2f}"
        e = "" if diff["expected"] is None else repr(diff["expected"])
        r = "" if diff["received"] is None else repr(diff["received"])
        what = {"substitution": f"expected {e}, got {r}", "missing": f"missing {e}",
                "extra": f"extra {r}"}[diff["kind"]]
        lines.append(f"  at {at} s  {what}")
    if len(shown) > 40:
        lines.append(f"  ... and {len(shown) - 40} more differences")
    det = d["detection"]
    if det is not None:
        if det["statistic"] is None:
            lines.append("  keying    the message does not fit in the recording")
        else:
            found = "found" if det["detected"] else "not found"
            speed = f"{det['wpm']:.1f} WPM"
            if det["farnsworth_wpm"] is not None:
                speed += f" (Farnsworth {det['farnsworth_wpm']:.1f} WPM overall)"
            cn0 = "n/a" if det["cn0_dbhz"] is None else f"{det['cn0_dbhz']:.1f} dB-Hz"
            lines.append(f"  keying    {found}: statistic {det['statistic']:.3f}, false-alarm "
                         f"probability {det['false_alarm_probability']:.2g}, {speed} from "
                         f"{det['start_s']:.2f} s, C/N0 {cn0}")
    for w in d.get("warnings", []):
        lines.append(f"  warning   {w}")
    return "\n".join(lines)


@main.command(context_settings=_CONTEXT)
@click.argument("files", nargs=-1, required=True, type=click.Path())
@click.option("--expect", "expect_text", default=None, metavar="TEXT",
              help="The message that was sent (prosigns as <AR>, <SK>, ...).")
@click.option("--expect-file", default=None, type=click.Path(), metavar="F",
              help="Expected messages, one per line. By default the recording holds them "
                   "in order, one after another (compared as one text); with "
                   "--alternatives it holds any one of them (the best match counts).")
@click.option("--alternatives", is_flag=True,
              help="The lines of --expect-file are alternatives, not messages in order.")
@click.option("--max-cer", type=float, default=0.0, show_default=True, metavar="X",
              help="Largest character error rate that still counts as received.")
@click.option("--no-detect", is_flag=True,
              help="Skip the search for the expected keying below the decoding threshold.")
@_receiver_options
@click.option("--json", "as_json", is_flag=True,
              help="One JSON object per file (JSON Lines) instead of the report.")
def verify(files, expect_text, expect_file, alternatives, max_cer, no_detect, carrier, channel,
           wpm, decoder, rate, iq_format, center_hz, as_json):
    """Check that recordings received the expected message, and how surely.

    Exit status 0 when every file received the message within --max-cer, 1 when any
    did not, 2 when any input was bad (the other files are still checked).
    """
    from .verify import verify_file

    if (expect_text is None) == (expect_file is None):
        _echo_err("verify: give the message with --expect TEXT or --expect-file F (one)")
        sys.exit(2)
    if expect_file is not None:
        try:
            with open(expect_file, encoding="utf-8") as fh:
                expected = [line.strip() for line in fh if line.strip()]
        except (OSError, UnicodeDecodeError) as err:
            _echo_err(f"{expect_file}: cannot be read ({type(err).__name__}); expected a "
                      "text file, one message per line")
            sys.exit(2)
        if not expected:
            _echo_err(f"{expect_file}: holds no message; expected one message per line")
            sys.exit(2)
    else:
        expected = expect_text
    status = 0
    options = _reader_options(rate, iq_format, center_hz)
    index = _channel_index(channel)
    if channel is not None and index is None:
        options["columns"] = channel  # a trace's column, by name
    for path in files:
        try:
            result = verify_file(path, expected, max_cer=max_cer,
                                 expect_alternatives=alternatives, detect=not no_detect,
                                 carrier_hz=carrier, channel=index, wpm=wpm, decoder=decoder,
                                 **options)
        except Exception as err:  # noqa: BLE001 - one line per file, the others go on
            _echo_err(fail_line(path, err))
            status = 2
            continue
        if as_json:
            click.echo(json.dumps(result.to_dict(), ensure_ascii=False))
        else:
            click.echo(_verify_summary(result))
        if not result.received and status == 0:
            status = 1
    sys.exit(status)

# --- batch ---
@main.command(context_settings=_CONTEXT)
@click.argument("source", metavar="INPUT", type=click.Path())
@click.option("--out", "out_dir", required=True, type=click.Path(), metavar="DIR",
              help="Output folder: results.sqlite, results.csv, results.json, report.html.")
@click.option("--workers", type=int, default=None, metavar="N",
              help="Worker processes. Default: one per CPU; 1 decodes in this process.")
@click.option("--scheduler", default=None, metavar="ADDRESS",
              help="Run on a Dask distributed cluster at this scheduler address "
                   "(pip install 'okdecode[cluster]'); the files must be reachable from its "
                   "workers at the same paths.")
@click.option("--max-cer", type=float, default=0.0, show_default=True, metavar="X",
              help="Largest character error rate still counted as received.")
@click.option("--decoder", type=click.Choice(list(DECODERS)), default=None,
              help="Decision method, where the manifest names none. Default: the "
                   f"receiver's ({DEFAULT_DECODER}).")
@click.option("--figures/--no-figures", default=True, show_default=True,
              help="A figure per recording in DIR/figures, linked from the report.")
@click.option("--json", "as_json", is_flag=True,
              help="One JSON object per recording as it is stored (JSON Lines), then the "
                   "campaign summary as a last object.")
def batch(source, out_dir, workers, scheduler, max_cer, decoder, figures, as_json):
    """Process a range-test campaign: INPUT is a folder (searched recursively) or a manifest
    CSV with a 'file' column (relative to the manifest) and optional expect, distance_m,
    rate_hz, iq_format, center_hz, carrier_hz, channel, wpm, decoder (other columns are
    kept as metadata).

    Results go to DIR/results.sqlite one by one; a re-run skips what is stored, so an
    interrupted run resumes. Exit 0 when every recording was processed, 1 when some
    failed, 2 when the batch could not start.
    """
    from .batch import run

    def shown(row: dict) -> None:
        if as_json:
            keep = ("file", "distance_m", "status", "error", "text", "cn0_dbhz", "snr_db",
                    "wpm", "expected", "received", "cer")
            click.echo(json.dumps({k: row[k] for k in keep}, ensure_ascii=False))
        elif row["status"] == "failed":
            _echo_err(row["error"])

    try:
        result = run(source, out_dir, workers=workers, scheduler=scheduler, max_cer=max_cer,
                     decoder=decoder, figures=None if figures else False, on_result=shown)
    except OkDecodeError as err:
        _echo_err(str(err))
        sys.exit(2)
    if as_json:
        click.echo(json.dumps(result.to_dict(), ensure_ascii=False))
    else:
        got = ("" if result.n_received is None else f", {result.n_received} received")
        click.echo(f"{result.n_recordings} recordings: {result.n_processed} processed, "
                   f"{result.n_skipped} already stored, {result.n_failed} failed{got}")
        click.echo(f"store   {result.store}")
        if result.report:
            click.echo(f"report  {result.report}")
    sys.exit(result.exit_status)
