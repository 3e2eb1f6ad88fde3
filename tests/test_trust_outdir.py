"""A run owns its output folder: manifest, refusal of foreign files and inputs, --force, lock,
leftovers of killed runs, nested output folders (issue 9, items 2 and 3).

Every case goes through the command line and looks at the folder before and after.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time

import pytest

from firnline.cli import main
from firnline.outdir import MANIFEST, lock_path

YEARS3 = ("2015-10-01", "2018-09-30")


def cli(args, capsys):
    code = main(args)
    cap = capsys.readouterr()
    return code, cap.out, cap.err


# ----------------------------------------------------------------------------
# a rerun replaces exactly the files of the earlier run
# ----------------------------------------------------------------------------

def test_rerun_with_fewer_years_leaves_no_stale_map(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path)
    out = tmp_path / "out"
    assert cli(["run", str(cfg), "--quiet"], capsys)[0] == 0
    first = {p.name for p in out.iterdir()}
    assert "annual_balance_2016.tif" in first and MANIFEST in first
    manifest = json.loads((out / MANIFEST).read_text())
    assert manifest["command"] == "run" and set(manifest["files"]) == first - {MANIFEST}
    # the same config, clipped to the last two years
    short = builders.folder_case(tmp_path, climate={"start": "2016-10-01"})
    assert cli(["run", str(short), "--quiet"], capsys)[0] == 0
    second = {p.name for p in out.iterdir()}
    assert not any("2016" in n for n in second), sorted(second)
    assert second == set(json.loads((out / MANIFEST).read_text())["files"]) | {MANIFEST}
    assert builders.work_entries(out) == []


def test_smaller_sweep_leaves_no_old_scenario_map(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path)
    out = tmp_path / "sweep"
    assert cli(["scenarios", str(cfg), "--warming", "1", "2", "3", "--out", str(out), "--quiet"], capsys)[0] == 0
    assert (out / "mean_annual_balance_w+3.0_p+0.tif").exists()
    assert cli(["scenarios", str(cfg), "--warming", "1", "--out", str(out), "--quiet"], capsys)[0] == 0
    maps = sorted(p.name for p in out.glob("mean_annual_balance_*.tif"))
    assert maps == ["mean_annual_balance_w+0.0_p+0.tif", "mean_annual_balance_w+1.0_p+0.tif"]


def test_other_command_output_folders_nested_inside_are_kept(builders, tmp_path, capsys):
    """The README's layout: out/ from run, out/scenarios from a sweep; a rerun of run keeps the sweep."""
    cfg = builders.folder_case(tmp_path)
    out = tmp_path / "out"
    assert cli(["run", str(cfg), "--quiet"], capsys)[0] == 0
    assert cli(["scenarios", str(cfg), "--warming", "1", "--out", str(out / "scenarios"), "--quiet"],
               capsys)[0] == 0
    sweep = builders.snapshot(out / "scenarios")
    assert cli(["run", str(cfg), "--warming", "0.5", "--quiet"], capsys)[0] == 0
    assert builders.snapshot(out / "scenarios") == sweep
    assert json.loads((out / "run.json").read_text())["scenario"]["warming_k"] == 0.5


def test_gdal_sidecar_of_an_output_is_replaced_with_it(builders, tmp_path, capsys):
    """A GIS computing statistics leaves annual_balance_2016.tif.aux.xml: it belongs to our file."""
    cfg = builders.folder_case(tmp_path)
    out = tmp_path / "out"
    assert cli(["run", str(cfg), "--quiet"], capsys)[0] == 0
    (out / "annual_balance_2016.tif.aux.xml").write_text("<PAMDataset/>")
    assert cli(["run", str(cfg), "--quiet"], capsys)[0] == 0
    assert not (out / "annual_balance_2016.tif.aux.xml").exists()   # stale statistics are gone


# ----------------------------------------------------------------------------
# foreign files and inputs: refused before any computation
# ----------------------------------------------------------------------------

def test_folder_with_a_file_no_firnline_run_wrote_is_refused_and_untouched(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path)
    out = tmp_path / "mine"
    out.mkdir()
    (out / "notes.txt").write_text("field notes, 2019 season")
    before = builders.snapshot(out)
    t0 = time.perf_counter()
    code, _, err = cli(["run", str(cfg), "--out", str(out)], capsys)
    assert code == 2
    line = builders.one_sentence_no_traceback(err)
    assert "notes.txt" in line and "--force" in line
    assert builders.snapshot(out) == before and builders.work_entries(out) == []
    assert time.perf_counter() - t0 < 30        # refused before computing (no kernel run)


def test_force_writes_beside_the_users_files_and_keeps_them(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path)
    out = tmp_path / "mine"
    (out / "sub").mkdir(parents=True)
    (out / "notes.txt").write_text("field notes")
    (out / "sub" / "photo.jpg").write_bytes(b"\xff\xd8jpeg")
    assert cli(["run", str(cfg), "--out", str(out), "--force", "--quiet"], capsys)[0] == 0
    assert (out / "notes.txt").read_text() == "field notes"
    assert (out / "sub" / "photo.jpg").read_bytes() == b"\xff\xd8jpeg"
    assert (out / "summary.csv").exists()
    manifest = json.loads((out / MANIFEST).read_text())
    assert "notes.txt" not in manifest["files"] and set(manifest["kept"]) == {"notes.txt", "sub"}
    # without --force the next run is refused again: the user's files are still there
    code, _, err = cli(["run", str(cfg), "--out", str(out)], capsys)
    assert code == 2 and "notes.txt" in err
    # and a second forced run keeps them still
    assert cli(["run", str(cfg), "--out", str(out), "--force", "--quiet"], capsys)[0] == 0
    assert (out / "notes.txt").read_text() == "field notes"


def test_output_changed_after_the_run_is_refused_by_name(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path)
    out = tmp_path / "out"
    assert cli(["run", str(cfg), "--quiet"], capsys)[0] == 0
    with open(out / "summary.csv", "a") as f:
        f.write("# my remark\n")
    before = builders.snapshot(out)
    code, _, err = cli(["run", str(cfg)], capsys)
    assert code == 2
    line = builders.one_sentence_no_traceback(err)
    assert "summary.csv" in line and "changed" in line
    assert builders.snapshot(out) == before


@pytest.mark.parametrize("inside", ["config", "dem", "station"])
@pytest.mark.parametrize("force", [False, True])
def test_an_input_inside_the_output_folder_is_refused_even_with_force(builders, tmp_path, capsys, inside, force):
    cfg = builders.folder_case(tmp_path)
    name = {"config": "case.toml", "dem": "dem.tif", "station": "station.csv"}[inside]
    if inside == "config":
        out = tmp_path            # the folder holding the config
    else:
        out = tmp_path / "data"
        out.mkdir()
        (tmp_path / name).rename(out / name)
        key = {"dem": ("dem", "path"), "station": ("climate", "station_file")}[inside]
        cfg = builders.folder_case(tmp_path / "cfg", **{key[0]: {key[1]: str(out / name)}})
        (tmp_path / "cfg" / name).unlink()
    before = builders.snapshot(out)
    code, _, err = cli(["run", str(cfg), "--out", str(out)] + (["--force"] if force else []), capsys)
    assert code == 2
    line = builders.one_sentence_no_traceback(err)
    assert name in line and "input" in line
    assert builders.snapshot(out) == before


def test_calibrate_never_writes_over_its_config(builders, tmp_path, capsys):
    builders.folder_case(tmp_path, observations={"glacier_balances": "gb.csv"},
         calibration={"parameters": ["ddf_ice_mm_per_day_k"]})
    (tmp_path / "gb.csv").write_text("glacier,start_date,end_date,balance_mwe,sigma_mwe\n"
                                     "test plane,2015-10-01,2016-09-30,-1.0,0.2\n")
    out = tmp_path / "cal"
    out.mkdir()
    (tmp_path / "case.toml").rename(out / "calibrated.toml")      # the config, named like the output
    text = (out / "calibrated.toml").read_text().replace('"dem.tif"', f'"{tmp_path / "dem.tif"}"')
    text = text.replace('"station.csv"', f'"{tmp_path / "station.csv"}"').replace('"gb.csv"',
                                                                                f'"{tmp_path / "gb.csv"}"')
    (out / "calibrated.toml").write_text(text)
    before = builders.snapshot(out)
    for extra in ([], ["--force"]):
        code, _, err = cli(["calibrate", str(out / "calibrated.toml"), "--out", str(out)] + extra, capsys)
        assert code == 2 and "calibrated.toml" in builders.one_sentence_no_traceback(err)
        assert builders.snapshot(out) == before


def test_calibrated_toml_runs_into_a_folder_beside_the_calibration(builders, tmp_path, capsys):
    gb = tmp_path / "gb.csv"
    cfg = builders.folder_case(tmp_path, observations={"glacier_balances": "gb.csv"}, output={"dir": "cal"},
               calibration={"parameters": ["ddf_ice_mm_per_day_k"]})
    gb.write_text("glacier,start_date,end_date,balance_mwe,sigma_mwe\n"
                  "test plane,2015-10-01,2016-09-30,-1.0,0.2\ntest plane,2016-10-01,2017-09-30,-1.2,0.2\n")
    assert cli(["calibrate", str(cfg), "--quiet"], capsys)[0] == 0
    fitted = tmp_path / "cal" / "calibrated.toml"
    before = fitted.read_bytes()
    assert cli(["run", str(fitted), "--quiet"], capsys)[0] == 0
    assert (tmp_path / "cal_fitted_run" / "summary.csv").exists()
    assert fitted.read_bytes() == before


# ----------------------------------------------------------------------------
# the lock
# ----------------------------------------------------------------------------

def test_a_second_run_into_a_locked_folder_is_refused(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path)
    out = tmp_path / "out"
    holder = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        lock_path(out).write_text(json.dumps({"pid": holder.pid, "host": os.uname().nodename}))
        code, _, err = cli(["run", str(cfg)], capsys)
        assert code == 2
        line = builders.one_sentence_no_traceback(err)
        assert f"process {holder.pid}" in line and "out" in line
        assert not out.exists()
        # a run into a folder inside the locked one is refused too
        code, _, err = cli(["run", str(cfg), "--out", str(out / "inner")], capsys)
        assert code == 2 and f"process {holder.pid}" in err
    finally:
        holder.kill()
        holder.wait()
    # the holder is gone: its stale lock is taken over
    assert cli(["run", str(cfg), "--quiet"], capsys)[0] == 0
    assert (out / "summary.csv").exists() and not lock_path(out).exists()


def test_stale_lock_of_a_reused_process_id_is_taken_over(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path)
    out = tmp_path / "out"
    # our own pid, but a start time that is not ours: the pid was reused
    lock_path(out).write_text(json.dumps({"pid": os.getpid(), "host": os.uname().nodename,
                                          "started": "1"}))
    assert cli(["run", str(cfg), "--quiet"], capsys)[0] == 0
    assert not lock_path(out).exists()


# ----------------------------------------------------------------------------
# leftovers of a killed run
# ----------------------------------------------------------------------------

def dead_pid() -> int:
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    p.wait()
    return p.pid


def test_leftovers_of_a_killed_run_are_removed_by_the_next_run(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path, radiation={"cache_dir": "cache"})
    out = tmp_path / "out"
    assert cli(["run", str(cfg), "--quiet"], capsys)[0] == 0
    pid = dead_pid()
    staging = tmp_path / f".out.firnline-staging-{pid}-0123456789ab"
    staging.mkdir()
    (staging / "summary.csv").write_text("half written")
    cache = tmp_path / "cache"
    cache.mkdir()
    stale_tmp = cache / f".radiation-abc.pid{pid}.x1y2.tmp"
    stale_tmp.write_bytes(b"partial")
    live_tmp = cache / f".radiation-def.pid{os.getpid()}.x1y2.tmp"      # someone writing right now
    live_tmp.write_bytes(b"in progress")
    lock_path(out).write_text(json.dumps({"pid": pid, "host": os.uname().nodename}))
    assert cli(["run", str(cfg), "--quiet"], capsys)[0] == 0
    assert builders.work_entries(out) == []
    assert not stale_tmp.exists() and live_tmp.exists()


def test_run_killed_between_the_two_renames_of_a_swap_gets_its_earlier_set_back(builders, tmp_path, capsys):
    """Where the system cannot exchange two folders in one step, the swap is two renames;
    a SIGKILL between them leaves the earlier set under a work name and no output folder."""
    cfg = builders.folder_case(tmp_path)
    out = tmp_path / "out"
    assert cli(["run", str(cfg), "--quiet"], capsys)[0] == 0
    earlier = builders.snapshot(out)
    pid = dead_pid()
    out.rename(tmp_path / f".out.firnline-old-{pid}-0123456789ab")
    (tmp_path / f".out.firnline-staging-{pid}-ba9876543210").mkdir()
    # the next run first restores the earlier set (a run that fails on its input leaves it so)
    bad = builders.folder_case(tmp_path / "bad", climate={"temperature_column": "nope"})
    code, _, err = cli(["run", str(bad), "--out", str(out)], capsys)
    assert code == 2 and "nope" in err
    assert builders.snapshot(out) == earlier and builders.work_entries(out) == []
