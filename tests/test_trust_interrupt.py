"""All or nothing when interrupted (issue 9, item 3).

A real ``python -m firnline run`` subprocess is paused at a named point through the
test hook (``FIRNLINE_PAUSE_DIR``: the run announces ``P.reached`` and waits on the FIFO
``P.go``), sent SIGINT or SIGTERM (or SIGKILL), then released. The output folder must
then hold exactly the complete earlier set or exactly the complete new set, the message
must say which, and nothing of firnline's work may be left beside it.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from firnline.cli import main
from firnline.outdir import MANIFEST, PAUSE_ENV, lock_path

# point -> which set the folder must hold after SIGINT/SIGTERM there
POINTS = {
    "locked": "old",          # checks done, lock taken, nothing computed yet
    "writing": "old",         # the new set half written into the staging folder
    "staged": "old",          # the new set complete in staging, not yet swapped in
    "swapping": "new",        # inside the swap (signals held back): it completes, then stops
    "swapped": "new",         # swapped in, the earlier set not yet deleted
}


def start(cfg: Path, out: Path, pause: Path, point: str, warming: str) -> subprocess.Popen:
    pause.mkdir(exist_ok=True)
    os.mkfifo(pause / f"{point}.go")
    env = dict(os.environ, **{PAUSE_ENV: str(pause)})
    return subprocess.Popen([sys.executable, "-m", "firnline", "run", str(cfg), "--out", str(out),
                             "--warming", warming, "--quiet"], env=env, stdin=subprocess.DEVNULL,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))


def wait_for(path: Path, proc: subprocess.Popen, timeout=180.0) -> None:
    t_end = time.monotonic() + timeout
    while not path.exists():
        if proc.poll() is not None:
            raise AssertionError(f"the run ended before {path.name}: {proc.stderr.read()}")
        if time.monotonic() > t_end:
            proc.kill()
            raise AssertionError(f"{path.name} never reached")
        time.sleep(0.02)


def release(pause: Path, point: str, proc: subprocess.Popen) -> None:
    """Let a paused run go on: write into its FIFO once it reads it (unless it has ended)."""
    t_end = time.monotonic() + 60
    while True:
        try:
            fd = os.open(pause / f"{point}.go", os.O_WRONLY | os.O_NONBLOCK)
        except OSError:          # ENXIO: the run is not (or no longer) reading the FIFO
            if proc.poll() is not None or time.monotonic() > t_end:
                return
            time.sleep(0.02)
            continue
        os.write(fd, b"go")
        os.close(fd)
        return


@pytest.fixture(scope="module")
def earlier(builders, tmp_path_factory):
    """A case and the complete earlier set (a run at 0 K) and the complete new set (+1 K)."""
    base = tmp_path_factory.mktemp("interrupt")
    cfg = builders.folder_case(base)
    old = base / "old_set"
    new = base / "new_set"
    assert main(["run", str(cfg), "--out", str(old), "--quiet"]) == 0
    assert main(["run", str(cfg), "--out", str(new), "--warming", "1", "--quiet"]) == 0
    return cfg, old, new


def same_set(builders, folder: Path, reference: Path) -> bool:
    """Same file names and the same tables (maps and run.json carry times, so compare what is fixed)."""
    a, b = builders.snapshot(folder), builders.snapshot(reference)
    if set(a) != set(b):
        return False
    for name in ("summary.csv", "profiles.csv", "balanced_budget.csv"):
        if a[name] != b[name]:
            return False
    return (json.loads(a["run.json"])["scenario"] == json.loads(b["run.json"])["scenario"]
            and set(json.loads(a[MANIFEST])["files"]) == set(json.loads(b[MANIFEST])["files"]))


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
@pytest.mark.parametrize("point", list(POINTS))
def test_interrupted_run_leaves_the_old_or_the_new_set_complete(builders, earlier, tmp_path, point, sig):
    cfg, old, new = earlier
    out = tmp_path / "out"
    assert main(["run", str(cfg), "--out", str(out), "--quiet"]) == 0      # the earlier set
    pause = tmp_path / "pause"
    proc = start(cfg, out, pause, point, "1")
    wait_for(pause / f"{point}.reached", proc)
    proc.send_signal(sig)
    release(pause, point, proc)
    _, err = proc.communicate(timeout=180)
    assert proc.returncode == 128 + sig, err
    assert "Traceback" not in err
    lines = [ln for ln in err.strip().splitlines() if ln.strip()]
    assert len(lines) == 1, err
    expect = POINTS[point]
    if expect == "old":
        assert same_set(builders, out, old), sorted(builders.snapshot(out))
        assert "still holds the earlier outputs" in lines[0]
    else:
        assert same_set(builders, out, new), sorted(builders.snapshot(out))
        assert "holds the new set" in lines[0]
    assert builders.work_entries(out) == []
    assert not lock_path(out).exists()


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_interrupted_first_run_writes_nothing(builders, earlier, tmp_path, sig):
    cfg, _, _ = earlier
    out = tmp_path / "fresh"
    pause = tmp_path / "pause"
    proc = start(cfg, out, pause, "staged", "0")
    wait_for(pause / "staged.reached", proc)
    proc.send_signal(sig)
    release(pause, "staged", proc)
    _, err = proc.communicate(timeout=180)
    assert proc.returncode == 128 + sig
    assert "no output was written" in err and "Traceback" not in err
    assert not out.exists() and builders.work_entries(out) == []


@pytest.mark.parametrize("point", ["writing", "swapping", "swapped"])
def test_sigkill_leftovers_are_cleared_by_the_next_run(builders, earlier, tmp_path, point):
    cfg, old, new = earlier
    out = tmp_path / "out"
    assert main(["run", str(cfg), "--out", str(out), "--quiet"]) == 0
    pause = tmp_path / "pause"
    proc = start(cfg, out, pause, point, "1")
    wait_for(pause / f"{point}.reached", proc)
    proc.kill()
    proc.communicate(timeout=60)
    # a killed run leaves either complete set in place (never a mixture) ...
    assert same_set(builders, out, old) or same_set(builders, out, new)
    assert same_set(builders, out, new) == (point == "swapped")
    # ... and work entries (staging, the earlier set, its lock) that the next run clears
    assert builders.work_entries(out)
    assert main(["run", str(cfg), "--out", str(out), "--warming", "1", "--quiet"]) == 0
    assert same_set(builders, out, new) and builders.work_entries(out) == []


@pytest.mark.parametrize("workers", [1, 2], ids=["in-process", "LocalCluster"])
def test_interrupted_tiled_run_leaves_the_old_set_complete(builders, earlier, tmp_path, workers):
    """SIGINT after the first of two units (tile_size 16 on the 20 x 10 case): the earlier set stays."""
    cfg, old, _ = earlier
    tiled = builders.folder_case(tmp_path / "case", compute={"tile_size": 16, "workers": workers})
    out = tmp_path / "out"
    assert main(["run", str(cfg), "--out", str(out), "--quiet"]) == 0      # the earlier set
    pause = tmp_path / "pause"
    proc = start(tiled, out, pause, "unit", "1")
    wait_for(pause / "unit.reached", proc)
    proc.send_signal(signal.SIGINT)
    release(pause, "unit", proc)
    _, err = proc.communicate(timeout=180)
    assert proc.returncode == 128 + signal.SIGINT, err
    assert "Traceback" not in err and "still holds the earlier outputs" in err
    assert len([ln for ln in err.strip().splitlines() if ln.strip()]) == 1, err
    assert same_set(builders, out, old), sorted(builders.snapshot(out))
    assert builders.work_entries(out) == [] and not lock_path(out).exists()
