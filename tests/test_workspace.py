"""The workspace as an analyst uses it: commands in subprocesses, re-fits, interruptions, concurrency."""

from __future__ import annotations

import contextlib
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from liftpool.data_prep import write_scenario
from liftpool.workspace import Workspace

pytestmark = pytest.mark.slow  # full fits, kills, re-fits


def run(*args, **kw):
    return subprocess.run([sys.executable, "-m", "liftpool", *map(str, args)], capture_output=True, text=True, **kw)


def start(*args):
    """A command in its own process group, as a terminal runs a job (Ctrl-C reaches the whole group).

    Output goes to files, not pipes: sampler worker processes inherit them.
    """
    import tempfile

    out = tempfile.TemporaryFile(mode="w+")
    proc = subprocess.Popen([sys.executable, "-m", "liftpool", *map(str, args)], stdout=out, stderr=out, text=True,
                            start_new_session=True)
    proc.output = out  # what it printed, once it has ended: seek(0) then read()
    return proc


def stop(proc, sig=signal.SIGKILL) -> None:
    with contextlib.suppress(ProcessLookupError):
        os.killpg(proc.pid, sig)


def snapshot(folder: Path) -> dict:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    d = tmp_path_factory.mktemp("data")
    paths = write_scenario(d, seed=17, scale=0.1)
    conv = pd.read_parquet(paths["conversions"])
    # a placebo stream found later: its conversions arrive in their own file
    later = conv[conv.outcome == "careers_page_visit"].assign(outcome="faq_page_visit")
    later.to_parquet(d / "conversions_faq.parquet")
    pd.DataFrame({"campaign": ["spring-planters", "tool-club"], "outcome": ["faq_page_visit"] * 2,
                  "role": ["placebo"] * 2}).to_csv(d / "new_placebos.csv", index=False)
    paths["later"] = d / "conversions_faq.parquet"
    paths["new_placebos"] = d / "new_placebos.csv"
    paths["n_later"] = len(later)
    return paths


def init(ws, data):
    r = run("init", ws, "--impressions", data["impressions"], "--conversions", data["conversions"],
            "--outcomes", data["outcomes"], "--users", data["users"], "--spend", data["spend"])
    assert r.returncode == 0, r.stderr
    return ws


def test_refit_cycle_end_to_end(tmp_path, data):
    ws = init(tmp_path / "ws", data)
    assert run("check", ws).returncode == 0
    r = run("prepare", ws, "-q")
    assert r.returncode == 0, r.stderr
    r = run("fit", ws, "--quick", "-q")
    assert r.returncode == 0 and "fit 001-quick written" in r.stdout, r.stderr
    assert run("report", ws, "-q").returncode == 0
    assert (ws / "reports" / "001-quick" / "report.html").is_file()
    first = snapshot(ws / "fits" / "001-quick")

    r = run("add-placebo", ws, "--outcomes", data["new_placebos"], "--conversions", data["later"], "-q")
    assert r.returncode == 0, r.stderr
    # only the new outcome's conversions were read
    assert f"read {data['n_later']:,} conversion rows of the new outcomes" in r.stdout
    assert run("fit", ws, "--quick", "-q").returncode == 0
    h = run("history", ws)
    assert h.returncode == 0 and "001-quick" in h.stdout and "002-quick" in h.stdout
    hist = Workspace.open(ws).history()
    assert list(hist["placebo pairs"]) == [hist["placebo pairs"][0], hist["placebo pairs"][0] + 2]
    # no sampler, nothing to converge
    assert list(hist["converged"]) == ["quick (no sampler checks)", "quick (no sampler checks)"]
    c = run("compare", ws, "1", "2")
    assert c.returncode == 0, c.stderr
    cmp = ws / "reports" / "compare-001-quick-vs-002-quick"
    assert (cmp / "compare.png").is_file()
    assert "(pooled bias mean, log odds)" in c.stdout
    # quick fits compared: said; changes of lifts in percentage points; files readable like other outputs
    assert "WARNING: fit 001-quick is a quick fit (no sampler checks)" in c.stdout
    assert " pp" in c.stdout
    mask = os.umask(0)
    os.umask(mask)
    assert {p.name: p.stat().st_mode & 0o777 for p in cmp.iterdir()} == {"compare.csv": 0o666 & ~mask,
                                                                          "compare.png": 0o666 & ~mask}
    table = pd.read_csv(cmp / "compare.csv")
    d = table["change in lift median (percentage points / 100)"]
    np.testing.assert_allclose(d, table["lift median (002-quick)"] - table["lift median (001-quick)"])
    # the first fit is untouched, byte for byte
    assert snapshot(ws / "fits" / "001-quick") == first
    # one damaged manifest does not hide the other fits
    import shutil

    shutil.copytree(ws / "fits" / "002-quick", ws / "fits" / "003-quick")
    (ws / "fits" / "003-quick" / "manifest.json").write_text("{")
    h = run("history", ws)
    assert h.returncode == 0 and "001-quick" in h.stdout and "damaged" in h.stdout
    shutil.rmtree(ws / "fits" / "003-quick")


def test_add_placebo_equals_preparing_from_scratch(tmp_path, data):
    a = Workspace.init(tmp_path / "a", data["impressions"], [data["conversions"]], [data["outcomes"]],
                       users=data["users"])
    a.prepare()
    _, rows = a.add_placebo(data["new_placebos"], data["later"])
    assert rows == data["n_later"]
    b = Workspace.init(tmp_path / "b", data["impressions"], [data["conversions"], data["later"]],
                       [data["outcomes"], data["new_placebos"]], users=data["users"])
    b.prepare()
    pd.testing.assert_frame_equal(a.counts(), b.counts())
    # the workspace remembers the new outcomes and conversions
    cfg = Workspace.open(tmp_path / "a").config["inputs"]
    assert len(cfg["outcomes"]) == 2 and len(cfg["conversions"]) == 2


def test_add_placebo_interrupted_before_the_config_is_written_can_be_retried(tmp_path, data, monkeypatch):
    # a crash (or a full disk) after the new counts became current and before liftpool.toml was written
    a = Workspace.init(tmp_path / "a", data["impressions"], [data["conversions"]], [data["outcomes"]],
                       users=data["users"])
    a.prepare()

    def full_disk(self):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(Workspace, "_write_config", full_disk)
    with pytest.raises(OSError):
        a.add_placebo(data["new_placebos"], data["later"])
    monkeypatch.undo()
    w = Workspace.open(tmp_path / "a")
    assert len(w.config["inputs"]["outcomes"]) == 1  # not listed yet ...
    new = set(pd.read_csv(data["new_placebos"])["outcome"])
    assert new <= set(w.counts()["outcome"])  # ... but counted: a fit now includes it
    w.add_placebo(data["new_placebos"], data["later"])  # the retry is not refused as "already listed"
    w = Workspace.open(tmp_path / "a")
    assert len(w.config["inputs"]["outcomes"]) == 2 and new <= set(w.counts()["outcome"])


def test_add_placebo_rejects_targets_and_duplicates(tmp_path, data):
    ws = Workspace.init(tmp_path / "w", data["impressions"], [data["conversions"]], [data["outcomes"]])
    ws.prepare()
    bad = tmp_path / "bad.csv"
    pd.DataFrame({"campaign": ["tool-club"], "outcome": ["join_tool_club"], "role": ["placebo"]}).to_csv(bad, index=False)
    r = run("add-placebo", tmp_path / "w", "--outcomes", bad)
    assert r.returncode == 2 and "already listed" in r.stderr and "Traceback" not in r.stderr
    pd.DataFrame({"campaign": ["tool-club"], "outcome": ["x"], "role": ["target"]}).to_csv(bad, index=False)
    r = run("add-placebo", tmp_path / "w", "--outcomes", bad)
    assert r.returncode == 2 and "only placebo outcomes" in r.stderr
    # a placebo without a single conversion row (a misspelling, or the wrong file): refused, nothing changed
    before = snapshot(tmp_path / "w")
    pd.DataFrame({"campaign": ["tool-club"], "outcome": ["newsletter_signupp"], "role": ["placebo"]}).to_csv(
        bad, index=False)
    r = run("add-placebo", tmp_path / "w", "--outcomes", bad)
    assert r.returncode == 2 and "Traceback" not in r.stderr, r.stderr
    assert "new outcome 'newsletter_signupp' has no conversion rows in" in r.stderr
    assert "check the outcome's spelling against the conversions file" in r.stderr
    assert snapshot(tmp_path / "w") == before


def test_config_rejects_unknown_keys_listing_valid_ones(tmp_path, data):
    ws = init(tmp_path / "ws", data)
    cfg = (ws / "liftpool.toml").read_text().replace("[model]", "[model]\nchain = 4")
    (ws / "liftpool.toml").write_text(cfg)
    r = run("fit", ws, "--quick")
    assert r.returncode == 2
    assert "unknown setting(s) 'chain'; valid settings are:" in r.stderr and "chains" in r.stderr


def _wait_for_lock(ws: Path, proc, timeout=120):
    t0 = time.time()
    while time.time() - t0 < timeout:
        if (ws / ".lock").exists() and (ws / ".lock").read_text().startswith("fit"):
            return
        assert proc.poll() is None, f"the fit ended early with code {proc.returncode}"
        time.sleep(0.2)
    raise AssertionError("the fit never took the lock")


@pytest.fixture(scope="module")
def fitted_ws(tmp_path_factory, data):
    ws = init(tmp_path_factory.mktemp("k") / "ws", data)
    assert run("prepare", ws, "-q").returncode == 0
    assert run("fit", ws, "--quick", "-q").returncode == 0
    return ws


@pytest.mark.parametrize("sig, group", [(signal.SIGINT, True), (signal.SIGKILL, True), (signal.SIGTERM, False),
                                        (signal.SIGKILL, False)])
def test_killed_fit_leaves_workspace_intact(fitted_ws, sig, group):
    # Ctrl-C in a terminal and kill -9 of the job reach the whole group; `kill PID` and `kill -9 PID`
    # reach the command alone, and a SIGKILL leaves its sampler workers behind holding the lock
    ws = fitted_ws
    before = snapshot(ws / "fits") | {"CURRENT": (ws / "prepared" / "CURRENT").read_bytes()}
    proc = start("fit", ws, "--draws", "20000", "--tune", "500", "-q")
    _wait_for_lock(ws, proc)
    time.sleep(6)  # compiling, then sampling in the worker processes
    if group:
        stop(proc, sig)
    else:
        os.kill(proc.pid, sig)
    proc.wait(timeout=120)
    if sig != signal.SIGKILL:
        assert proc.returncode == 130
    else:
        time.sleep(1)  # let the killed group's worker processes go
    after = snapshot(ws / "fits") | {"CURRENT": (ws / "prepared" / "CURRENT").read_bytes()}
    visible = {k: v for k, v in after.items() if not any(part.startswith(".") for part in Path(k).parts)}
    assert visible == before
    w = Workspace.open(ws)
    assert w.fit_ids() == ["001-quick"] and len(w.counts()) > 0
    # the lock is free again
    assert run("fit", ws, "--quick", "-q").returncode == 0
    assert Workspace.open(ws).fit_ids()[-1].endswith("quick")
    import shutil

    shutil.rmtree(ws / "fits" / Workspace.open(ws).fit_ids()[-1])


def test_second_concurrent_fit_is_refused(fitted_ws):
    ws = fitted_ws
    proc = start("fit", ws, "--draws", "20000", "--tune", "500", "-q")
    try:
        _wait_for_lock(ws, proc)
        r = run("fit", ws, "--quick")
        assert r.returncode == 2
        assert "the workspace is busy (fit, process" in r.stderr and "Traceback" not in r.stderr
        # check only reads: it runs beside the fit
        r = run("check", ws)
        assert r.returncode == 0 and "all inputs are valid" in r.stdout, r.stderr
    finally:
        stop(proc)
        proc.wait(timeout=60)


def test_a_lock_left_by_a_dead_command_is_recovered(tmp_path):
    # a killed fit's workers inherit the lock; the command that took it is gone: the next command
    # stops the leftovers and takes the lock (a live command's lock is never touched)
    from liftpool.workspace import _recover_stale_lock  # noqa: F401 - the code under test

    lock = tmp_path / ".lock"
    code = f"""
import fcntl, os, subprocess, sys, time
f = open({str(lock)!r}, "a+")
fcntl.flock(f, fcntl.LOCK_EX | fcntl.LOCK_NB)
f.write("fit, process %d, since now" % os.getpid()); f.flush()
child = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(120)"], pass_fds=(f.fileno(),),
                         stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
print(child.pid, flush=True)
os._exit(0)
"""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    orphan = int(out.split()[0])
    assert Path(f"/proc/{orphan}").exists()
    ws = Workspace.__new__(Workspace)
    ws.path = tmp_path
    with ws.lock("test"):
        assert "test, process" in lock.read_text()
    time.sleep(0.2)
    assert not Path(f"/proc/{orphan}").exists() or "Z" in Path(f"/proc/{orphan}/stat").read_text().split()[2]


def test_current_must_name_a_preparation(tmp_path, data):
    from liftpool.data_prep.errors import InputError

    ws = Workspace.init(tmp_path / "w", data["impressions"], [data["conversions"]], [data["outcomes"]])
    (tmp_path / "w" / "prepared").mkdir(exist_ok=True)
    (tmp_path / "w" / "prepared" / "CURRENT").write_text("../../../base\n")
    with pytest.raises(InputError) as e:
        ws.counts()
    assert e.value.problem == "prepared/CURRENT names '../../../base', not a preparation (gen-NNN)"


def test_the_exposure_cache_is_private(tmp_path, data):
    # it holds user ids (docs/workspace.md): owner-only, whatever the umask
    import stat

    ws = Workspace.init(tmp_path / "w", data["impressions"], [data["conversions"]], [data["outcomes"]])
    ws.prepare()
    cache = ws.current() / "cache"
    assert cache.is_dir()
    assert stat.S_IMODE(cache.stat().st_mode) == 0o700
    files = [p for p in cache.rglob("*") if p.is_file()]
    assert files and all(stat.S_IMODE(p.stat().st_mode) == 0o600 for p in files)


@pytest.mark.slow
def test_ctrl_c_during_a_duckdb_query_ends_the_command_at_once(tmp_path):
    # DuckDB does not stop for a KeyboardInterrupt raised while it works: the handler interrupts its
    # queries, and the error that follows is reported as the interruption (exit 130), not as a bug
    import duckdb

    imp = tmp_path / "impressions.csv"
    con = duckdb.connect()
    con.execute(f"""COPY (SELECT 'u' || (i % 500000) AS user_id, 'c' || (i % 3) AS campaign,
                    TIMESTAMP '2026-03-01 00:00:00' + to_seconds(i % 86400) AS served_at,
                    (i % 2 = 0) AS viewable, i AS impression_no FROM range(6000000) t(i))
                    TO '{imp}' (HEADER)""").fetchall()
    pd.DataFrame({"user_id": ["u1"], "outcome": ["buy"], "converted_at": ["2026-03-02T00:00:00Z"]}).to_csv(
        tmp_path / "conversions.csv", index=False)
    pd.DataFrame({"campaign": ["c0", "c0", "c1", "c2"], "outcome": ["buy", "visit", "buy", "buy"],
                  "role": ["target", "placebo", "target", "target"]}).to_csv(tmp_path / "outcomes.csv", index=False)
    out = tmp_path / "counts.parquet"
    proc = start("prepare", "--impressions", imp, "--conversions", tmp_path / "conversions.csv",
                 "--outcomes", tmp_path / "outcomes.csv", "--out", out)
    time.sleep(4.0)  # imports done, reading the 6M rows
    assert proc.poll() is None, "prepare ended before the interrupt"
    t0 = time.time()
    stop(proc, signal.SIGINT)
    code = proc.wait(timeout=60)
    proc.output.seek(0)
    text = proc.output.read()
    assert code == 130, text
    assert time.time() - t0 < 8.0  # not the 10 s grace period: the query stopped when told
    assert "interrupted: nothing was changed by the unfinished step" in text and "Traceback" not in text
    assert "internal error" not in text
    assert not out.exists() and not list(tmp_path.glob("counts.summary*"))


def test_the_interrupt_handler_stops_a_running_duckdb_query():
    # a query that would run for minutes: Ctrl-C stops it within moments (without the handler's
    # interrupt, DuckDB carries on and only the 10 s grace period's hard exit ends the command)
    code = """
import os, signal, threading, time
from liftpool import cli
from liftpool.data_prep.sources import connect
cli._install_interrupt_watchdog(grace_seconds=60)
con = connect()
threading.Timer(0.5, lambda: os.kill(os.getpid(), signal.SIGINT)).start()
t0 = time.time()
try:
    con.execute("SELECT count(*) FROM range(100000000000) t(i) WHERE i % 7 = 3").fetchall()
    print("finished")
except BaseException as e:
    print(type(e).__name__, round(time.time() - t0, 2), cli._INTERRUPTED["hit"])
"""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120).stdout.split()
    assert out[0] != "finished" and float(out[1]) < 5.0 and out[2] == "True", out
