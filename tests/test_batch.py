"""Tests of okdecode.batch: discovery, manifests, the results store, resuming, Dask."""

from __future__ import annotations

import csv
import json
import math
import os
import re
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from hypothesis import given
from hypothesis import strategies as st

from okdecode import batch
from okdecode.cli import main
from okdecode.errors import ParameterError
from okdecode.synth import synth_file

REPO = Path(__file__).resolve().parents[1]
MESSAGES = ("XQ7ZB", "TEST XQ7ZB", "VVV XQ7ZB", "XQ7ZB 73")


def make_recordings(folder: Path, n: int, *, cn0_dbhz: float = 40.0, wpm: float = 25.0
                    ) -> list[dict]:
    """n short 8 kHz FLAC files, seeded; the true texts and a distance each."""
    folder.mkdir(parents=True, exist_ok=True)
    rows = []
    for i in range(n):
        name = f"r{i:02d}.flac"
        msg = MESSAGES[i % len(MESSAGES)]
        synth_file(folder / name, msg, rate_hz=8000.0, wpm=wpm, cn0_dbhz=cn0_dbhz,
                   lead_s=0.2, tail_s=0.2, seed=i)
        rows.append({"file": name, "expect": msg, "distance_m": 50.0 * (i + 1),
                     "site": f"site {i}"})
    return rows


def write_manifest(path: Path, rows: list[dict]) -> Path:
    with open(path, "w", newline="", encoding="utf-8") as f:
        w = csv.DictWriter(f, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    return path


@pytest.fixture(scope="module")
def campaign(tmp_path_factory) -> Path:
    """Six good recordings and their manifest."""
    folder = tmp_path_factory.mktemp("campaign")
    write_manifest(folder / "manifest.csv", make_recordings(folder, 6))
    return folder


def read_csv(path: Path) -> list[dict]:
    with open(path, newline="", encoding="utf-8") as f:
        return list(csv.DictReader(f))


def content(store_path: Path) -> list[tuple]:
    """The store's rows without the columns that hold clock readings, sorted."""
    con = sqlite3.connect(store_path)
    keep = [c for c in batch.COLUMN_NAMES if c not in batch.VOLATILE_COLUMNS]
    rows = sorted(con.execute(f"SELECT {', '.join(keep)} FROM results"))
    con.close()
    return rows


# --- discovery and manifests ----------------------------------------------------------------


def test_discover_finds_every_kind_and_skips_what_is_no_recording(tmp_path):
    names = ["a.wav", "b.FLAC", "c.ogg", "d.sigmf-meta", "d.sigmf-data", "e.sigmf", "f.cu8",
             "g.cs8", "h.cs16", "i.cf32", "j.iq", "k.csv", "l.txt", "m.npy", "notes.md",
             ".hidden.wav", "sub/deeper/n.wav", ".git/o.wav", "out/p.wav"]
    for name in names:
        (tmp_path / name).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / name).write_bytes(b"x")
    (tmp_path / "list.csv").write_text("file,distance_m\na.wav,5\n")  # a manifest
    (tmp_path / "k.csv").write_text("time,CH1\n0,1\n")  # a trace
    found = [j.file for j in batch.discover(tmp_path, exclude=[tmp_path / "out"])]
    assert found == ["a.wav", "b.FLAC", "c.ogg", "d.sigmf-meta", "e.sigmf", "f.cu8", "g.cs8",
                     "h.cs16", "i.cf32", "j.iq", "k.csv", "l.txt", "m.npy", "sub/deeper/n.wav"]
    assert all(Path(j.path).is_absolute() for j in batch.discover(tmp_path))


def test_manifest_columns_become_options_and_metadata(tmp_path):
    write_manifest(tmp_path / "m.csv", [
        {"file": "sub/x.cf32", "expect": "XQ7ZB", "distance_m": "120", "rate_hz": "48000",
         "iq_format": "cf32_le", "carrier_hz": "1500", "channel": "1", "site": "Ostle Farm",
         "antenna": "whip"},
        {"file": "y.wav", "expect": "", "distance_m": "", "rate_hz": "", "iq_format": "",
         "carrier_hz": "", "channel": "", "site": "", "antenna": ""}])
    a, b = batch.read_manifest(tmp_path / "m.csv")
    assert a.path == str((tmp_path / "sub/x.cf32").resolve())
    assert (a.file, a.expect, a.distance_m) == ("sub/x.cf32", "XQ7ZB", 120.0)
    assert a.reader_options == {"rate_hz": 48000.0, "iq_format": "cf32_le"}
    assert a.decode_options == {"carrier_hz": 1500.0, "channel": 1}
    assert a.metadata == {"site": "Ostle Farm", "antenna": "whip"}
    assert (b.expect, b.distance_m, b.reader_options, b.decode_options) == (None, None, {}, {})
    assert a.settings_hash() != b.settings_hash()


@pytest.mark.parametrize("bad", ["../outside.flac", "sub/../../outside.flac", "/etc/passwd",
                                 "link/outside.flac"])
def test_manifest_paths_outside_its_folder_are_refused(tmp_path, bad):
    inner = tmp_path / "campaign"
    inner.mkdir()
    (tmp_path / "elsewhere").mkdir()
    (tmp_path / "elsewhere" / "outside.flac").write_bytes(b"x")
    (inner / "link").symlink_to(tmp_path / "elsewhere")  # a link out of the folder
    manifest = write_manifest(inner / "m.csv", [{"file": "ok.flac"}, {"file": bad}])
    with pytest.raises(ParameterError, match=r"m\.csv: line 3: file .* lies outside"):
        batch.read_manifest(manifest)
    res = CliRunner().invoke(main, ["batch", str(manifest), "--out", str(tmp_path / "o")])
    assert res.exit_code == 2
    assert "lies outside" in res.stderr
    assert not (tmp_path / "o" / "results.sqlite").exists()  # refused before anything


@pytest.mark.parametrize(("text", "match"), [
    ("name,distance_m\na.wav,3\n", r"has no 'file' column"),
    ("file,distance_m\na.wav,far\n", r"line 2, column 'distance_m' is 'far'"),
    ("file,channel\na.wav,1.5\n", r"line 2, column 'channel' is '1.5'; expected an integer"),
    ("file\n", r"lists no recordings"),
])
def test_bad_manifests_say_where(tmp_path, text, match):
    (tmp_path / "m.csv").write_text(text)
    with pytest.raises(ParameterError, match=r"m\.csv: " + match):
        batch.read_manifest(tmp_path / "m.csv")


@given(st.text(alphabet=st.sampled_from(list('file,expect,distance_m,channel\n"../ab/1.5x')),
               max_size=80))
def test_the_manifest_reader_parses_or_raises_parameter_error(tmp_path_factory, text):
    folder = tmp_path_factory.mktemp("fuzz")
    (folder / "m.csv").write_text(text, encoding="utf-8")
    try:
        jobs = batch.read_manifest(folder / "m.csv")
    except ParameterError as err:
        assert str(err).startswith(f"{folder / 'm.csv'}: ")
    else:
        root = folder.resolve()
        for job in jobs:
            assert Path(job.path).is_relative_to(root)  # never outside the folder
            assert job.distance_m is None or math.isfinite(job.distance_m)
            assert set(job.decode_options) <= {"channel"}


def test_a_batch_that_cannot_start_exits_2(tmp_path):
    runner = CliRunner()
    res = runner.invoke(main, ["batch", str(tmp_path / "missing"), "--out", str(tmp_path)])
    assert res.exit_code == 2 and "missing: no such file or folder" in res.stderr
    (tmp_path / "empty").mkdir()
    res = runner.invoke(main, ["batch", str(tmp_path / "empty"), "--out", str(tmp_path / "o")])
    assert res.exit_code == 2 and "holds no recordings" in res.stderr
    (tmp_path / "o2").mkdir()
    (tmp_path / "o2" / "results.sqlite").write_text("not a database")
    (tmp_path / "empty" / "a.wav").write_bytes(b"x")
    res = runner.invoke(main, ["batch", str(tmp_path / "empty"), "--out", str(tmp_path / "o2")])
    assert res.exit_code == 2 and "results.sqlite: cannot be used as a results store" in (
        res.stderr)




# --- the store ------------------------------------------------------------------------------


def test_a_run_stores_every_figure_and_verification(campaign, tmp_path):
    out = tmp_path / "out"
    res = CliRunner().invoke(main, ["batch", str(campaign / "manifest.csv"), "--out", str(out),
                                    "--workers", "1", "--json", "--no-figures"])
    assert res.exit_code == 0, res.output
    lines = [json.loads(x) for x in res.stdout.splitlines()]
    assert len(lines) == 7 and lines[-1]["n_processed"] == 6 and lines[-1]["n_failed"] == 0
    assert "batch [" not in res.stderr  # no progress bar when stderr is not a terminal
    con = sqlite3.connect(out / "results.sqlite")
    assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    con.close()
    with batch.Store(out / "results.sqlite") as store:
        rows = store.rows()
    truth = {r["file"]: r for r in read_csv(campaign / "manifest.csv")}
    assert len(rows) == 6
    for row in rows:
        t = truth[row["file"]]
        assert row["status"] == "ok" and row["error"] is None
        assert row["text"] == t["expect"] and row["received"] is True and row["cer"] == 0.0
        assert row["distance_m"] == float(t["distance_m"])
        assert row["metadata"] == {"site": t["site"]}
        assert row["okdecode_version"] == batch.__version__
        # every figure of the decode JSON is in its column and in the full object
        d = row["decode"]
        for key in ("text", "cn0_dbhz", "snr_db", "wpm", "duration_s", "carrier_hz"):
            assert row[key] == d[key]
        for key, value in d["timing"].items():
            assert row[key] == value
        assert row["n_characters"] == len(d["characters"])
        assert row["verification"]["expected"] == t["expect"]
    exported = read_csv(out / "results.csv")
    assert sorted(r["file"] for r in exported) == sorted(truth)
    assert {r["site"] for r in exported} == {t["site"] for t in truth.values()}
    as_json = json.loads((out / "results.json").read_text(encoding="utf-8"))
    assert [r["file"] for r in as_json] == [r["file"] for r in rows]
    assert (out / "report.html").stat().st_size > 0


def test_docs_describe_every_column():
    doc = (REPO / "docs" / "store.md").read_text(encoding="utf-8")
    doc = doc.split("## Table `results`")[1].split("\n## ")[0]
    documented = set(re.findall(r"^\| `(\w+)` \|", doc, flags=re.M))
    assert documented == set(batch.COLUMN_NAMES)


def test_a_corrupted_file_is_stored_with_its_error_and_the_rest_go_on(campaign, tmp_path):
    folder = tmp_path / "mixed"
    folder.mkdir()
    for name in ("r00.flac", "r01.flac", "r02.flac"):
        (folder / name).write_bytes((campaign / name).read_bytes())
    (folder / "bad.wav").write_text("this is no audio\n")
    data = (campaign / "r03.flac").read_bytes()
    (folder / "cut.flac").write_bytes(data[: len(data) // 3])  # truncated
    out = tmp_path / "out"
    res = CliRunner().invoke(main, ["batch", str(folder), "--out", str(out), "--workers", "1",
                                    "--no-figures"])
    assert res.exit_code == 1
    assert "okdecode: bad.wav: " in res.stderr and "okdecode: cut.flac: " in res.stderr
    with batch.Store(out / "results.sqlite") as store:
        rows = {r["file"]: r for r in store.rows()}
    assert set(rows) == {"bad.wav", "cut.flac", "r00.flac", "r01.flac", "r02.flac"}
    assert rows["bad.wav"]["status"] == "failed"
    assert rows["bad.wav"]["error"].startswith("bad.wav: ")
    assert rows["cut.flac"]["status"] == "failed" and rows["cut.flac"]["error"].startswith(
        "cut.flac: ")
    assert all(rows[f"r0{i}.flac"]["status"] == "ok" for i in range(3))
    assert rows["r01.flac"]["text"] == MESSAGES[1]
    # the failed files are tried again on the next run; the good ones are not
    again = batch.run(folder, out, workers=1, report=False, figures=False)
    assert (again.n_processed, again.n_skipped, again.n_failed) == (2, 3, 2)
    assert again.exit_status == 1


def test_two_runs_with_the_same_inputs_give_the_same_store(campaign, tmp_path):
    a = batch.run(campaign / "manifest.csv", tmp_path / "a", workers=2, report=False,
                  figures=False)
    b = batch.run(campaign / "manifest.csv", tmp_path / "b", workers=1, report=False,
                  figures=False)
    assert a.n_processed == b.n_processed == 6
    first = content(tmp_path / "a" / "results.sqlite")
    assert first == content(tmp_path / "b" / "results.sqlite")
    # and a third run into the first folder decodes nothing and changes nothing
    c = batch.run(campaign / "manifest.csv", tmp_path / "a", workers=2, report=False,
                  figures=False)
    assert (c.n_processed, c.n_skipped) == (0, 6)
    assert content(tmp_path / "a" / "results.sqlite") == first


def test_a_rerun_takes_new_metadata_without_decoding_again(campaign, tmp_path):
    rows = read_csv(campaign / "manifest.csv")
    folder = tmp_path / "c"
    folder.mkdir()
    for r in rows[:2]:
        (folder / r["file"]).write_bytes((campaign / r["file"]).read_bytes())
    write_manifest(folder / "m.csv", rows[:2])
    batch.run(folder / "m.csv", tmp_path / "o", workers=1, report=False, figures=False)
    rows[0]["site"], rows[0]["distance_m"] = "Wendle Rise", "777"
    write_manifest(folder / "m.csv", rows[:2])
    again = batch.run(folder / "m.csv", tmp_path / "o", workers=1, report=False,
                      figures=False)
    assert (again.n_processed, again.n_skipped) == (0, 2)
    with batch.Store(tmp_path / "o" / "results.sqlite") as store:
        got = {r["file"]: r for r in store.rows()}
    assert got[rows[0]["file"]]["metadata"] == {"site": "Wendle Rise"}
    assert got[rows[0]["file"]]["distance_m"] == 777.0
    # other settings are another row: a new expected text is verified anew
    rows[1]["expect"] = "SOMETHING ELSE"
    write_manifest(folder / "m.csv", rows[:2])
    third = batch.run(folder / "m.csv", tmp_path / "o", workers=1, report=False,
                      figures=False)
    assert (third.n_processed, third.n_skipped) == (1, 1) and third.n_received == 1


def test_a_sigmf_recording_keeps_its_own_metadata_and_hashes_its_data(tmp_path):
    from okdecode.synth import synth

    rec = synth("XQ7ZB", rate_hz=8000.0, iq=True, carrier_hz=600.0, wpm=25.0, cn0_dbhz=45.0,
                seed=3)
    rec.samples.astype(np.complex64).tofile(tmp_path / "hollin.sigmf-data")
    meta = {"global": {"core:datatype": "cf32_le", "core:sample_rate": 8000.0,
                       "core:version": "1.0.0", "core:description": "XQ7ZB at Hollin Cross"},
            "captures": [{"core:sample_start": 0}], "annotations": []}
    (tmp_path / "hollin.sigmf-meta").write_text(json.dumps(meta))
    out = tmp_path / "out"
    first = batch.run(tmp_path, out, workers=1, report=False, figures=False)
    assert first.n_failed == 0
    with batch.Store(out / "results.sqlite") as store:
        (got,) = store.rows()
    assert got["file"] == "hollin.sigmf-meta" and got["text"] == "XQ7ZB"
    assert got["capture_metadata"]["sigmf"]["global"]["core:description"] == (
        "XQ7ZB at Hollin Cross")
    # the key covers the samples too: new data under the same metadata is a new recording
    (rec.samples[::-1]).astype(np.complex64).tofile(tmp_path / "hollin.sigmf-data")
    second = batch.run(tmp_path, out, workers=1, report=False, figures=False)
    assert (second.n_processed, second.n_skipped) == (1, 0)


def test_the_progress_bar_counts_when_asked(campaign, tmp_path, capsys):
    folder = tmp_path / "one"
    folder.mkdir()
    (folder / "r00.flac").write_bytes((campaign / "r00.flac").read_bytes())
    batch.run(folder, tmp_path / "o", workers=1, report=False, figures=False, progress=True)
    assert "1/1 r00.flac" in capsys.readouterr().err


# --- resuming after a real kill -------------------------------------------------------------


def test_a_killed_run_resumes_to_a_complete_consistent_store(tmp_path):
    folder = tmp_path / "many"
    make_recordings(folder, 24)
    out = tmp_path / "out"
    store_path = out / "results.sqlite"
    cmd = [sys.executable, "-m", "okdecode", "batch", str(folder), "--out", str(out),
           "--workers", "1", "--no-figures"]
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    child = subprocess.Popen(cmd, cwd=REPO, env=env, stdout=subprocess.DEVNULL,
                             stderr=subprocess.PIPE)
    n_before = 0
    deadline = time.monotonic() + 120
    try:
        while n_before == 0 and child.poll() is None and time.monotonic() < deadline:
            time.sleep(0.005)
            if store_path.exists():
                try:
                    con = sqlite3.connect(f"file:{store_path}?mode=ro", uri=True, timeout=1)
                    n_before = con.execute("SELECT count(*) FROM results").fetchone()[0]
                    con.close()
                except sqlite3.OperationalError:
                    n_before = 0  # the table is not made yet
        child.send_signal(signal.SIGKILL)  # kill -9, in the middle of the run
    finally:
        child.wait(timeout=30)
    assert child.returncode == -signal.SIGKILL, child.stderr.read().decode()
    con = sqlite3.connect(store_path)
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    n_killed = con.execute("SELECT count(*) FROM results").fetchone()[0]
    con.close()
    assert 1 <= n_killed < 24  # results landed, and the kill came before the end
    done = subprocess.run(cmd + ["--json"], cwd=REPO, env=env, capture_output=True, text=True,
                          timeout=300)
    assert done.returncode == 0, done.stderr + done.stdout
    summary = json.loads(done.stdout.splitlines()[-1])
    assert summary["n_skipped"] == n_killed and summary["n_processed"] == 24 - n_killed
    # complete and the same as a run of the same command that was never interrupted
    clean = [*cmd[:6], str(tmp_path / "clean"), *cmd[7:]]
    subprocess.run(clean, cwd=REPO, env=env, capture_output=True, timeout=300, check=True)
    assert content(store_path) == content(tmp_path / "clean" / "results.sqlite")
    assert len(content(store_path)) == 24


# --- Dask -----------------------------------------------------------------------------------


def test_the_dask_path_gives_the_same_results_as_the_local_one(campaign, tmp_path):
    distributed = pytest.importorskip("distributed")
    local = batch.run(campaign / "manifest.csv", tmp_path / "local", workers=1, report=False,
                      figures=False)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  dashboard_address=None) as cluster:
        remote = batch.run(campaign / "manifest.csv", tmp_path / "dask",
                           scheduler=cluster.scheduler_address, report=False, figures=False)
    assert remote.n_processed == local.n_processed == 6
    assert content(tmp_path / "dask" / "results.sqlite") == content(
        tmp_path / "local" / "results.sqlite")


def test_an_unreachable_scheduler_stops_the_batch_before_it_starts(campaign, tmp_path):
    pytest.importorskip("distributed")
    with pytest.raises(ParameterError, match="cannot reach the Dask scheduler"):
        batch.run(campaign / "manifest.csv", tmp_path / "o", scheduler="tcp://127.0.0.1:9",
                  report=False, figures=False, connect_timeout_s=1.0)
