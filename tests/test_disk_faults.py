"""A read-only or full output disk: exit 2 with the folder, what was found and the fix, before the work
where it can be known (the fit), and nothing half-written. The disks are small tmpfs mounts (root
only, as the session and CI run; the tests skip elsewhere)."""

from __future__ import annotations

import contextlib
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

pytestmark = pytest.mark.slow  # mounts, a preparation and fits (CI runs it)


def run(*args):
    return subprocess.run([sys.executable, "-m", "liftpool", *map(str, args)], capture_output=True, text=True)


@contextlib.contextmanager
def tmpfs(path: Path, options: str):
    path.mkdir(parents=True, exist_ok=True)
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", options, "tmpfs", str(path)], capture_output=True, text=True)
    if r.returncode:
        pytest.skip(f"cannot mount a tmpfs here ({r.stderr.strip() or 'not root'})")
    try:
        yield path
    finally:
        subprocess.run(["umount", "-l", str(path)], capture_output=True)


@pytest.fixture(scope="module")
def counts_and_fit(small_scenario, tmp_path_factory):
    root = tmp_path_factory.mktemp("disk")
    p = small_scenario
    counts = root / "counts.parquet"
    r = run("prepare", "--impressions", p["impressions"], "--conversions", p["conversions"], "--outcomes",
            p["outcomes"], "--out", counts, "-q")
    assert r.returncode == 0, r.stderr
    fit = root / "fit"
    assert run("fit", "--counts", counts, "--out", fit, "--quick", "-q").returncode == 0
    return root, counts, fit


def test_a_fit_to_a_read_only_disk_is_refused_before_the_work(counts_and_fit):
    root, counts, _ = counts_and_fit
    with tmpfs(root / "ro", "ro,size=1m") as ro:
        r = run("fit", "--counts", counts, "--out", ro / "f", "--quick")
        assert r.returncode == 2, r.stderr
        assert r.stderr == (f"error: {ro / 'f'}: cannot write in {ro}: Read-only file system\n"
                            "  fix: choose an output place on a disk you can write to\n")
        assert "fitting" not in r.stdout + r.stderr  # refused before any work


@pytest.mark.parametrize("size", ["200k", "3m"])
def test_a_fit_to_a_full_disk_is_refused_and_leaves_nothing(counts_and_fit, size):
    # 200k: no room even for the margin (refused before the work); 3m: the fit's own files do not fit
    # (refused before writing them: a full disk met by the HDF5 writer crashed the process, exit 139)
    root, counts, _ = counts_and_fit
    with tmpfs(root / f"full{size}", f"size={size}") as full:
        r = run("fit", "--counts", counts, "--out", full / "f", "--quick")
        assert r.returncode == 2, r.stderr
        assert f"not enough free space in {full}:" in r.stderr and "MB needed" in r.stderr
        assert "free some space on that disk" in r.stderr and "Traceback" not in r.stderr
        assert list(full.iterdir()) == []


def test_a_report_that_fills_the_disk_is_bad_input_and_leaves_nothing(counts_and_fit):
    root, _, fit = counts_and_fit
    size = sum(f.stat().st_size for f in fit.rglob("*") if f.is_file())
    with tmpfs(root / "nearly", f"size={size // 1024 + 160}k") as disk:
        shutil.copytree(fit, disk / "fit")
        r = run("report", "--fit", disk / "fit", "--out", disk / "rep", "-q")
        assert r.returncode == 2, r.stderr
        assert "No space left on device" in r.stderr and "internal error" not in r.stderr
        assert sorted(x.name for x in disk.iterdir()) == ["fit"]  # no report, no staging folder
