"""Hostile inputs through the command line (issue 9, items 4-8).

Each case: exit status 2, one sentence naming the culprit, no traceback, and the
output folder's contents before and after (old outputs intact, nothing new, no work
entries left beside it).
"""

from __future__ import annotations

import errno
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin

import firnline
from firnline import cache
from firnline.cli import main


def cli(args, capsys):
    code = main(args)
    cap = capsys.readouterr()
    return code, cap.out, cap.err


def refused(builders, args, capsys, *words, folder: Path | None = None) -> str:
    """Run, expect exit 2 with one sentence holding ``words``; ``folder`` must not change."""
    before = builders.snapshot(folder) if folder is not None else None
    code, _, err = cli(args, capsys)
    assert code == 2, err
    line = builders.one_sentence_no_traceback(err)
    for w in words:
        assert w in line, (w, line)
    if folder is not None:
        assert builders.snapshot(folder) == before
        assert not folder.exists() or builders.work_entries(folder) == []
    return line


@pytest.fixture
def earlier(builders, tmp_path, capsys):
    """A case with a complete earlier set in tmp_path/out."""
    cfg = builders.folder_case(tmp_path)
    assert cli(["run", str(cfg), "--quiet"], capsys)[0] == 0
    return cfg, tmp_path / "out"


# ----------------------------------------------------------------------------
# 4. output-folder problems, found before computing
# ----------------------------------------------------------------------------

def test_out_naming_a_file(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path)
    f = tmp_path / "results.txt"
    f.write_text("mine")
    refused(builders, ["run", str(cfg), "--out", str(f)], capsys, "results.txt", "is a file")
    assert f.read_text() == "mine"


def test_out_under_a_file(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path)
    f = tmp_path / "results.txt"
    f.write_text("mine")
    refused(builders, ["run", str(cfg), "--out", str(f / "out")], capsys, "results.txt", "which is a file")
    assert f.read_text() == "mine"


def test_read_only_output_folder(builders, earlier, capsys):
    cfg, out = earlier
    os.chmod(out, 0o555)
    try:
        refused(builders, ["run", str(cfg), "--warming", "1"], capsys, "read-only", folder=out)
    finally:
        os.chmod(out, 0o755)


def test_read_only_parent_folder(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path)
    parent = tmp_path / "locked"
    parent.mkdir()
    os.chmod(parent, 0o555)
    try:
        refused(builders, ["run", str(cfg), "--out", str(parent / "out")], capsys, "read-only", str(parent))
        assert list(parent.iterdir()) == []
    finally:
        os.chmod(parent, 0o755)


def test_over_long_folder_name(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path)
    refused(builders, ["run", str(cfg), "--out", str(tmp_path / ("x" * 300))], capsys, "bytes long", "shorter name")
    refused(builders, ["run", str(cfg), "--out", str(tmp_path / ("y" * 240))], capsys, "too long", "shorter name")


def test_cache_folder_that_is_a_file(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path, radiation={"cache_dir": "cachefile"})
    (tmp_path / "cachefile").write_text("not a folder")
    refused(builders, ["run", str(cfg)], capsys, "cache_dir", "cachefile", "is a file")
    assert not (tmp_path / "out").exists()


def test_cache_folder_inside_the_output_folder(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path, radiation={"cache_dir": "out/cache"})
    refused(builders, ["run", str(cfg)], capsys, "cache_dir", "inside the output folder")


def test_disk_full_on_a_small_tmpfs_keeps_the_old_outputs_and_says_it_once(builders, tmp_path, capsys):
    """A real full disk where the test may mount a 3 MB tmpfs (root on Linux); the injected
    variant below runs everywhere."""
    fs = tmp_path / "fs"
    fs.mkdir()
    if subprocess.run(["mount", "-t", "tmpfs", "-o", "size=3m", "tmpfs", str(fs)],
                      capture_output=True).returncode != 0:
        pytest.skip("cannot mount a tmpfs here; test_disk_full_injected covers the case")
    try:
        cfg = builders.folder_case(tmp_path / "in")
        out = fs / "out"
        assert cli(["run", str(cfg), "--out", str(out), "--quiet"], capsys)[0] == 0
        free = os.statvfs(fs).f_bavail * os.statvfs(fs).f_frsize
        (fs / "filler").write_bytes(b"\0" * (free - 60 * 1024))
        before = builders.snapshot(out)
        r = subprocess.run([sys.executable, "-m", "firnline", "run", str(cfg), "--out", str(out),
                            "--warming", "1", "--quiet"], capture_output=True, text=True)
        assert r.returncode == 2
        line = builders.one_sentence_no_traceback(r.stderr)        # no libtiff/GDAL lines around it
        assert "no space left on the device" in line and "still holds the earlier outputs" in line
        assert builders.snapshot(out) == before and builders.work_entries(out) == []
    finally:
        subprocess.run(["umount", str(fs)], capture_output=True)


def test_disk_full_injected(builders, earlier, capsys, monkeypatch):
    cfg, out = earlier
    from firnline import outputs

    real = outputs.write_geotiff
    calls = {"n": 0}

    def full_disk(*a, **k):
        calls["n"] += 1
        if calls["n"] == 3:
            raise OSError(errno.ENOSPC, "No space left on device")
        return real(*a, **k)
    monkeypatch.setattr("firnline.products.write_geotiff", full_disk)
    refused(builders, ["run", str(cfg), "--warming", "1"], capsys, "no space left on the device",
            "still holds the earlier outputs", folder=out)


# ----------------------------------------------------------------------------
# 5. inputs that could hang or exhaust memory
# ----------------------------------------------------------------------------

@pytest.mark.parametrize("kind", ["fifo", "device", "folder"])
@pytest.mark.parametrize("role", ["config", "dem", "station", "outlines", "observations"])
def test_special_file_as_input_is_refused_at_once(builders, tmp_path, capsys, role, kind):
    if kind == "fifo":
        special = tmp_path / "special"
        os.mkfifo(special)
    elif kind == "device":
        special = Path("/dev/zero")
    else:
        special = tmp_path / "special"
        special.mkdir()
    sections = {"dem": {"path": "dem.tif"}, "station": {}, "outlines": {}, "observations": {}}
    if role == "dem":
        cfg = builders.folder_case(tmp_path, dem={"path": str(special)})
    elif role == "station":
        cfg = builders.folder_case(tmp_path, climate={"station_file": str(special)})
    elif role == "outlines":
        cfg = builders.folder_case(tmp_path, glaciers={"outlines": str(special)})
    elif role == "observations":
        cfg = builders.folder_case(tmp_path, observations={"glacier_balances": str(special)},
                   calibration={"parameters": ["ddf_ice_mm_per_day_k"]})
    else:
        cfg = special
    del sections
    command = "calibrate" if role == "observations" else "run"
    # a FIFO nobody writes into would block a reader forever: the run must not even open it
    r = subprocess.run([sys.executable, "-m", "firnline", command, str(cfg)], capture_output=True,
                       text=True, timeout=120, stdin=subprocess.DEVNULL)
    assert r.returncode == 2, r.stderr
    line = builders.one_sentence_no_traceback(r.stderr)
    want = {"fifo": "FIFO", "device": "device", "folder": "folder"}[kind]
    assert want in line and str(special) in line
    assert not (tmp_path / "out").exists()


def test_memory_estimate_refuses_a_run_that_cannot_fit(builders, tmp_path, capsys):
    """A sparse 200 000 x 200 000 DEM (its header says 4e10 cells; the file is tiny). Small units
    (tile_size 256), so the check of one unit passes on any machine and the whole run is refused."""
    builders.folder_case(tmp_path)
    builders.write_sparse_dem(tmp_path / "big.tif", 200_000)
    cfg = builders.folder_case(tmp_path, dem={"path": "big.tif"}, compute={"tile_size": 256})
    line = refused(builders, ["run", str(cfg)], capsys, "200000 x 200000 cells", "memory", "coarser DEM",
                   "3 balance years")
    assert "GB" in line
    assert not (tmp_path / "out").exists()


def test_band_width_below_one_metre_is_refused(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path, balance={"band_width_m": 0.01})
    refused(builders, ["run", str(cfg)], capsys, "band_width_m", ">= 1")


# ----------------------------------------------------------------------------
# 6. absurd values
# ----------------------------------------------------------------------------

def test_daily_precipitation_above_the_world_record_is_refused(builders, tmp_path, capsys):
    """Source: the one-day world record is 1825 mm (Foc-Foc, La Reunion, 1966; from memory),
    so 2000 mm bounds any real daily total (common practice)."""
    cfg = builders.folder_case(tmp_path)
    lines = (tmp_path / "station.csv").read_text().splitlines()
    parts = lines[10].split(",")
    parts[2] = "9999"                                         # a missing-value code
    lines[10] = ",".join(parts)
    (tmp_path / "station.csv").write_text("\n".join(lines) + "\n")
    refused(builders, ["run", str(cfg)], capsys, "station.csv", "line 11", "9999", "2000 mm")


@pytest.mark.parametrize("value", [-32768.0, 9500.0])
def test_elevation_outside_the_earth_is_refused(builders, tmp_path, capsys, value):
    """Bounds: the Dead Sea shore (about -430 m) and Everest (8849 m), common practice."""
    cfg = builders.folder_case(tmp_path)
    z = builders.ramp()
    z[3, 4] = value                                           # a void code without nodata set
    builders.write_dem(tmp_path / "dem.tif", z, nodata=-9999.0)
    refused(builders, ["run", str(cfg)], capsys, "dem.tif", f"{value:g}", "-500..9000 m", "row 3 column 4")


def test_multiband_dem_uses_band_1_and_says_so(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path)
    z = builders.ramp().astype("float32")
    with rasterio.open(tmp_path / "dem.tif", "w", driver="GTiff", width=z.shape[1], height=z.shape[0],
                       count=2, dtype="float32", crs="EPSG:32632", transform=from_origin(600000, 5150000, 50, 50),
                       nodata=-9999) as dst:
        dst.write(z, 1)
        dst.write(np.zeros_like(z), 2)
        dst.set_band_description(1, "elevation")
    code, _, err = cli(["run", str(cfg)], capsys)
    assert code == 0
    assert 'dem.tif has 2 bands; band 1 ("elevation") is used as the elevation.' in err
    notes = json.loads((tmp_path / "out" / "run.json").read_text())["notes"]
    assert any("band 1" in n for n in notes)


@pytest.mark.parametrize("name", ["urn:ogc:def:crs:EPSG::999999", "Seldra local grid"])
def test_geojson_crs_member_naming_an_unknown_crs_is_refused(builders, tmp_path, capsys, name):
    """GDAL reads such a member as longitude/latitude without a word; firnline refuses it."""
    ring = [[600000, 5150000], [600500, 5150000], [600500, 5149000], [600000, 5149000], [600000, 5150000]]
    (tmp_path / "gl.geojson").write_text(json.dumps({
        "type": "FeatureCollection", "crs": {"type": "name", "properties": {"name": name}},
        "features": [{"type": "Feature", "properties": {"name": "a"},
                      "geometry": {"type": "Polygon", "coordinates": [ring]}}]}))
    cfg = builders.folder_case(tmp_path, glaciers={"outlines": "gl.geojson"})
    refused(builders, ["run", str(cfg)], capsys, "gl.geojson", name, "not a known coordinate reference system")


def test_geojson_crs_member_naming_a_known_crs_is_used(builders, tmp_path, capsys):
    ring = [[600000, 5150000], [600500, 5150000], [600500, 5149000], [600000, 5149000], [600000, 5150000]]
    (tmp_path / "gl.geojson").write_text(json.dumps({
        "type": "FeatureCollection", "crs": {"type": "name", "properties": {"name": "urn:ogc:def:crs:EPSG::32632"}},
        "features": [{"type": "Feature", "properties": {"name": "a"},
                      "geometry": {"type": "Polygon", "coordinates": [ring]}}]}))
    cfg = builders.folder_case(tmp_path, glaciers={"outlines": "gl.geojson"})
    assert cli(["run", str(cfg), "--quiet"], capsys)[0] == 0
    s = (tmp_path / "out" / "summary.csv").read_text()
    assert "\na," in s                                           # the outline lies on the DEM


@pytest.mark.parametrize("args,words", [
    (["run", "--warming", "25"], ["25 K", "-20..+20 K"]),
    (["run", "--warming", "-21"], ["-21 K"]),
    (["scenarios", "--warming", "1", "100"], ["100 K"]),
    (["run", "--precip-change", "400"], ["400 %", "+300 %"]),
    (["scenarios", "--warming", "1", "--precip-change", "0", "1000"], ["1000 %"]),
])
def test_absurd_scenarios_are_refused_before_any_work(builders, tmp_path, capsys, args, words):
    cfg = builders.folder_case(tmp_path)
    refused(builders, [args[0], str(cfg)] + args[1:], capsys, *words)
    assert not (tmp_path / "out").exists()


# ----------------------------------------------------------------------------
# 7. cache integrity
# ----------------------------------------------------------------------------

def test_damaged_cache_entries_are_misses_recomputed_and_said(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path, melt={"method": "radiation"},
                               radiation={"cache_dir": "cache", "horizon_sectors": 8, "horizon_distance_m": 2000.0})
    assert cli(["run", str(cfg), "--quiet"], capsys)[0] == 0
    first = (tmp_path / "out" / "summary.csv").read_bytes()
    entries = sorted((tmp_path / "cache").glob("*.npz"))
    assert len(entries) == 2
    for e in entries:                              # group-readable: a shared cache on a team server
        assert os.stat(e).st_mode & 0o040
    assert os.stat(tmp_path / "cache").st_mode & 0o050 == 0o050
    table = next(e for e in entries if e.name.startswith("radiation-"))
    horizons = next(e for e in entries if e.name.startswith("horizon-"))
    # a table of the right key but a wrong shape and a recomputed checksum: out of bounds if trusted
    with np.load(table) as d:
        arrays = {k: d[k] for k in d.files}
    arrays["values"] = arrays["values"][:, :5].copy()
    arrays["sha256_values"] = np.array(cache._digest(arrays["values"]))
    np.savez(table, **arrays)
    # horizons whose bytes were damaged on disk (same shape, checksum no longer matching)
    with np.load(horizons) as d:
        harr = {k: d[k] for k in d.files}
    harr["horizon_rad"] = harr["horizon_rad"] + np.float32(0.01)
    np.savez(horizons, **harr)
    code, _, err = cli(["run", str(cfg), "--warming", "0"], capsys)
    assert code == 0
    assert "radiation table" in err and "covers 5 cells" in err and "recomputed" in err
    assert "horizons" in err and "checksum" in err
    assert (tmp_path / "out" / "summary.csv").read_bytes() == first   # the recomputed table: same result
    # the repaired entries are trusted again
    code, _, err = cli(["run", str(cfg)], capsys)
    assert code == 0 and "reused the cached radiation climatology" in err


def test_truncated_cache_file_is_a_miss(tmp_path):
    key = cache.cache_key(dem_sha256="x")
    table = firnline.radiation.RadiationTable(doy_nodes=np.arange(1, 10), values=np.ones((9, 4), "uint16"),
                                              scale_w_m2=0.025)
    path = cache.save_table(tmp_path, key, table)
    assert cache.load_table(tmp_path, key, n_cells=4) is not None
    assert cache.load_table(tmp_path, key, n_cells=5) is None
    path.write_bytes(path.read_bytes()[:100])
    assert cache.load_table(tmp_path, key, n_cells=4) is None
    assert "cannot be read" in cache.MISSES[str(path)]


# ----------------------------------------------------------------------------
# 8. the remaining tracebacks of the trial
# ----------------------------------------------------------------------------

def test_directory_as_station_file(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path, climate={"station_file": "stations"})
    (tmp_path / "stations").mkdir()
    refused(builders, ["run", str(cfg)], capsys, "stations", "folder", "station_file")


@pytest.mark.parametrize("balance,sigma,what", [("1e308", "0.2", "1e+308"), ("-1.0", "1e-300", "1e-300")])
def test_non_finite_calibration_residual_names_the_row(builders, tmp_path, capsys, balance, sigma, what):
    cfg = builders.folder_case(tmp_path, observations={"glacier_balances": "gb.csv"},
               calibration={"parameters": ["ddf_ice_mm_per_day_k"]}, output={"dir": "cal"})
    (tmp_path / "gb.csv").write_text("glacier,start_date,end_date,balance_mwe,sigma_mwe\n"
                                     "test plane,2015-10-01,2016-09-30,-1.0,0.2\n"
                                     f"test plane,2016-10-01,2017-09-30,{balance},{sigma}\n")
    refused(builders, ["calibrate", str(cfg)], capsys, "gb.csv", "line 3", what, "not a finite number")
    assert not (tmp_path / "cal").exists()


# ----------------------------------------------------------------------------
# demo refusal
# ----------------------------------------------------------------------------

def test_demo_refuses_files_of_its_names_that_are_not_its_own(builders, tmp_path, capsys):
    folder = tmp_path / "demo"
    folder.mkdir()
    (folder / "my_notes.txt").write_text("mine")
    assert cli(["demo", str(folder), "--quiet"], capsys)[0] == 0
    assert (folder / "my_notes.txt").read_text() == "mine"           # written beside the user's files
    first = builders.snapshot(folder)
    assert cli(["demo", str(folder), "--quiet"], capsys)[0] == 0      # its own files: replaced, same
    assert builders.snapshot(folder) == first
    builders.write_station(folder / "station.csv", "2000-10-01", "2001-09-30")  # the user's own station.csv
    refused(builders, ["demo", str(folder)], capsys, "station.csv", "not firnline's demo file", folder=folder)
    assert not any(p.name.startswith(".firnline-demo-staging") for p in folder.iterdir())


def test_empty_out_and_out_with_a_line_break_are_refused(builders, tmp_path, capsys):
    cfg = builders.folder_case(tmp_path)
    before = sorted(p.name for p in tmp_path.iterdir())
    refused(builders, ["run", str(cfg), "--out", ""], capsys, "--out is empty")
    refused(builders, ["run", str(cfg), "--out", str(tmp_path / "a\nb")], capsys, "control character")
    assert sorted(p.name for p in tmp_path.iterdir()) == before
