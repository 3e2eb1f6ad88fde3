"""One config per call, layers that do not leak, and the small defects found in review."""

from __future__ import annotations

import ast
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import firnline
from firnline.cli import main
from firnline.errors import InputError
from firnline.model import prepare, simulate

SRC = Path(__file__).resolve().parents[1] / "src" / "firnline"


# ----------------------------------------------------------------------------
# one config per call
# ----------------------------------------------------------------------------

def test_a_setup_from_another_config_is_refused(plane_case):
    setup = prepare(firnline.load_config(plane_case(balance={"band_width_m": 50.0})))
    wide = firnline.load_config(plane_case(balance={"band_width_m": 200.0}))
    with pytest.raises(ValueError, match=r"\[balance\]"):
        firnline.run(wide, setup=setup)
    from firnline.scenarios import sweep
    with pytest.raises(ValueError, match=r"\[balance\]"):
        sweep(setup, [1.0], config=wide)
    other_method = firnline.load_config(plane_case(melt={"method": "radiation"}))
    with pytest.raises(ValueError, match="method"):
        simulate(setup, other_method)


def test_only_kernel_parameters_may_differ_and_are_used_and_recorded(plane_case, tmp_path):
    base = firnline.load_config(plane_case())
    setup = prepare(base)
    other = base.with_values(ddf_snow_mm_per_day_k=4.5, precip_factor=1.2)
    reused = firnline.run(other, setup=setup)
    fresh = firnline.run(other)
    pd.testing.assert_frame_equal(reused.summary, fresh.summary)
    assert not np.allclose(reused.summary.annual_balance_mwe, firnline.run(base).summary.annual_balance_mwe)
    reused.write(tmp_path / "o")
    info = json.loads((tmp_path / "o" / "run.json").read_text())
    assert info["parameters"]["melt"]["ddf_snow_mm_per_day_k"] == 4.5
    assert info["parameters"]["downscaling"]["precip_factor"] == 1.2


# ----------------------------------------------------------------------------
# layers
# ----------------------------------------------------------------------------

def _imports(module: Path) -> set[str]:
    tree = ast.parse(module.read_text())
    out = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            out |= {f"{'.' * node.level}{node.module or ''}"} | {f".{a.name}" for a in node.names if not node.module}
        elif isinstance(node, ast.Import):
            out |= {a.name for a in node.names}
    return out


def test_the_run_writer_does_not_import_the_sweep_module():
    assert not {".scenarios", ".scenario_products", "firnline.scenarios"} & _imports(SRC / "products.py")
    code = "import sys, firnline.products; print('firnline.scenarios' in sys.modules)"
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert r.stdout.strip() == "False"


def test_no_module_reads_a_docstring_as_data():
    for path in SRC.rglob("*.py"):
        tree = ast.parse(path.read_text())
        names = {n.attr for n in ast.walk(tree) if isinstance(n, ast.Attribute)}
        names |= {a.name for n in ast.walk(tree) if isinstance(n, ast.ImportFrom) for a in n.names}
        assert "__doc__" not in names, path


def test_sweep_rules_are_data_and_reach_scenarios_json(plane_case, tmp_path):
    from firnline.scenarios import RULES
    out = tmp_path / "sw"
    assert main(["scenarios", str(plane_case()), "--warming", "1", "--out", str(out), "--quiet"]) == 0
    assert json.loads((out / "scenarios.json").read_text())["rules"] == list(RULES)


def test_balanced_budget_is_a_metric_of_one_run():
    import firnline.metrics as metrics
    import firnline.scenarios as scenarios
    assert hasattr(metrics, "balanced_budget") and not hasattr(scenarios, "balanced_budget")


def test_input_error_is_a_value_error():
    assert issubclass(InputError, ValueError)


def test_physics_modules_do_not_name_config_keys_or_options():
    from firnline.radiation import compute_table
    from firnline.scenarios import scenario_list
    valid = np.ones((2, 2), bool)
    zeros = np.zeros((2, 2))
    with pytest.raises(InputError) as e:
        compute_table(zeros, valid, zeros, zeros, np.zeros((4, 2, 2)), 46.0, 8.0, 0.0, 15)
    assert "[" not in str(e.value)
    with pytest.raises(InputError) as e:
        scenario_list([], [])
    assert "--" not in str(e.value) and "warming_k" in str(e.value)
    with pytest.raises(InputError, match="--precip-change"):
        scenario_list([1.0], [-100.0], names=("--warming", "--precip-change"))


def test_calibrate_is_a_package_of_small_modules():
    pkg = SRC / "calibrate"
    assert {p.stem for p in pkg.glob("*.py")} == {"__init__", "spec", "operator", "discharge", "fit", "outputs"}
    assert all(len(p.read_text().splitlines()) < 400 for p in pkg.glob("*.py"))
    from firnline.report import fit_figure  # noqa: F401  (the figure lives with the others)


def test_ablation_gradient_uses_the_one_line_fit():
    """The balance gradient equals numpy.polyfit's slope (reference library)."""
    from firnline.metrics import Profile, ablation_gradient
    zc = np.array([2000.0, 2100.0, 2200.0, 2300.0])
    b = np.array([-3.0, -2.1, -1.4, 0.2])
    prof = Profile(zc - 50.0, zc + 50.0, np.ones(4), b)
    assert ablation_gradient(prof, 2350.0, "ok") == pytest.approx(np.polyfit(zc, b, 1)[0] * 100.0, rel=1e-12)


def test_one_progress_protocol(plane_case):
    calls = []
    firnline.run(firnline.load_config(plane_case(melt={"method": "radiation"})),
                 progress=lambda label, done, total: calls.append((label, done, total)))
    labels = {c[0] for c in calls}
    assert {"days", "horizon sectors", "radiation row bands"} <= labels
    for label in labels:
        mine = [c for c in calls if c[0] == label]
        assert all(0 < d <= t for _, d, t in mine) and mine[-1][1] == mine[-1][2], label


# ----------------------------------------------------------------------------
# small defects
# ----------------------------------------------------------------------------

def test_station_error_after_a_blank_line_names_the_right_line(plane_case, tmp_path, capsys):
    cfg = plane_case()
    station = tmp_path / "station.csv"
    lines = station.read_text().splitlines()
    lines.insert(3, "")                                   # a blank line 4
    lines[5] = lines[5].split(",")[0] + ",warm,1.0"       # line 6 of the file is bad
    station.write_text("\n".join(lines) + "\n")
    assert main(["run", str(cfg), "--quiet"]) == 2
    assert "line 6 " in capsys.readouterr().err


def test_the_cache_note_names_the_file_that_exists(plane_case):
    cfg = firnline.load_config(plane_case(melt={"method": "radiation"}))
    prepare(cfg)
    note = next(n for n in prepare(cfg).notes if "reused" in n)
    name = note.split("(")[1].split(")")[0]
    assert Path(name).name.startswith("radiation-") and Path(name).exists()


def test_dead_code_is_gone():
    from firnline import config, demo, observations
    assert not hasattr(config, "default")
    assert not hasattr(observations.Table, "column")
    assert not hasattr(demo, "STATION_NAME")


def test_terrain_products_carry_their_own_provenance(plane_case, tmp_path):
    import rasterio
    cfg = plane_case(radiation={"write_horizons": True})
    out = tmp_path / "terrain"
    assert main(["terrain", str(cfg), "--out", str(out), "--quiet"]) == 0
    with rasterio.open(out / "slope.tif") as t:
        slope = t.tags()
    with rasterio.open(out / "radiation_annual.tif") as t:
        rad = t.tags()
    with rasterio.open(out / "horizon.tif") as t:
        hz = t.tags()
    for tags in (slope, rad, hz):
        assert tags["config"] == str(cfg.resolve()) and tags["config_sha256"] and tags["caution"]
    assert "Horn" in slope["method"] and "transmissivity" not in slope
    assert "Hock" in rad["method"] and rad["transmissivity"] == "0.75"
    assert "Dozier" in hz["method"] and "transmissivity" not in hz and hz["horizon_sectors"] == "72"


def test_terrain_is_an_api_function(plane_case, tmp_path):
    result = firnline.model.terrain(firnline.load_config(plane_case()))
    assert result.slope_deg.shape == result.grid.shape and result.horizons is None
    files = result.write(tmp_path / "t")
    assert {f.name for f in files} == {"slope.tif", "aspect.tif", "radiation_monthly.tif",
                                       "radiation_annual.tif"}


def test_setup_is_frozen(plane_case):
    import dataclasses
    setup = prepare(firnline.load_config(plane_case()))
    with pytest.raises(dataclasses.FrozenInstanceError):
        setup.radiation = None
    sub = setup.select(np.arange(0, setup.cells.size, 2))
    assert sub.cells.size == (setup.cells.size + 1) // 2 and sub.glacier_pos == ()
    whole = setup.select(np.arange(setup.cells.size))
    assert np.array_equal(whole.glacier_pos[0], setup.glacier_pos[0])
