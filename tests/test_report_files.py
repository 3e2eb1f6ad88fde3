"""The files of issue 15 that GIS and climate tools read: COG layout, NetCDF-CF, glaciers.gpkg,
the glacier-id attribute table, and the tables people paste (summary.csv).

The COG check reads the TIFF structure itself (TIFF 6.0 / BigTIFF headers and IFDs) and
applies the layout rules of a cloud-optimised GeoTIFF. Source: GDAL COG driver
documentation ("IFDs before data", overviews, tile order) and the OGC Cloud Optimized
GeoTIFF standard (OGC 21-026, 2023), requirement classes for tiling, reduced-resolution
subfiles and header-first layout.

The CF check is written out below against the NetCDF Climate and Forecast (CF)
Metadata Conventions 1.8; each check names its section. Source: CF Conventions 1.8
(2020); the standard names and canonical units are from the CF Standard Name Table
(from memory).
"""

from __future__ import annotations

import json
import re
import struct
import xml.etree.ElementTree as ET
from pathlib import Path

import netCDF4
import numpy as np
import pandas as pd
import pytest
import rasterio
import shapely
from pyogrio import list_layers
from pyogrio.raw import read as read_layer
from pyproj import CRS

# --------------------------------------------------------------------------
# COG layout
# --------------------------------------------------------------------------

_TYPE_SIZE = {1: 1, 2: 1, 3: 2, 4: 4, 5: 8, 6: 1, 7: 1, 8: 2, 9: 4, 10: 8, 11: 4, 12: 8, 16: 8, 17: 8, 18: 8}
_TYPE_FMT = {1: "B", 3: "H", 4: "I", 16: "Q", 6: "b", 8: "h", 9: "i", 17: "q"}


def tiff_ifds(path: Path) -> tuple[list[dict], bytes]:
    """Every IFD of a TIFF or BigTIFF: {tag: values, "_offset": ..., "_end": ...} and the file bytes."""
    data = Path(path).read_bytes()
    bo = {b"II": "<", b"MM": ">"}[data[:2]]
    magic = struct.unpack(bo + "H", data[2:4])[0]
    big = magic == 43
    assert magic in (42, 43), "not a TIFF"
    off = struct.unpack(bo + "Q", data[8:16])[0] if big else struct.unpack(bo + "I", data[4:8])[0]
    ifds = []
    while off:
        if big:
            n = struct.unpack(bo + "Q", data[off:off + 8])[0]
            pos, esize = off + 8, 20
        else:
            n = struct.unpack(bo + "H", data[off:off + 2])[0]
            pos, esize = off + 2, 12
        ifd = {"_offset": off}
        for i in range(n):
            e = data[pos + i * esize: pos + (i + 1) * esize]
            if big:
                tag, typ, count = struct.unpack(bo + "HHQ", e[:12])
                raw_val = e[12:20]
            else:
                tag, typ, count = struct.unpack(bo + "HHI", e[:8])
                raw_val = e[8:12]
            size = _TYPE_SIZE.get(typ, 1) * count
            if size > len(raw_val):
                voff = struct.unpack(bo + ("Q" if big else "I"), raw_val)[0]
                buf = data[voff:voff + size]
            else:
                buf = raw_val[:size]
            if typ in _TYPE_FMT:
                ifd[tag] = list(struct.unpack(bo + _TYPE_FMT[typ] * count, buf))
            else:
                ifd[tag] = buf
        end = pos + n * esize
        off = struct.unpack(bo + ("Q" if big else "I"), data[end:end + (8 if big else 4)])[0]
        ifd["_end"] = end
        ifds.append(ifd)
    return ifds, data


def check_cog(path: Path) -> None:
    """Assert the layout of a cloud-optimised GeoTIFF (see the module docstring for the source)."""
    ifds, data = tiff_ifds(path)
    # tiled: TileWidth (322), TileLength (323), TileOffsets (324), TileByteCounts (325); no strips (273)
    for k, ifd in enumerate(ifds):
        assert 322 in ifd and 324 in ifd and 273 not in ifd, f"{path.name}: IFD {k} is not tiled"
    # overviews present: reduced-resolution subfiles (NewSubfileType 254, bit 0) after the full image,
    # each smaller than the one before
    assert len(ifds) >= 2, f"{path.name}: no overviews"
    assert ifds[0].get(254, [0])[0] & 1 == 0
    for prev, ov in zip(ifds, ifds[1:]):
        assert ov.get(254, [0])[0] & 1 == 1, f"{path.name}: an IFD after the first is not an overview"
        assert ov[256][0] < prev[256][0] and ov[257][0] < prev[257][0]
    # IFDs before data: every IFD (with its out-of-line values) ends before the first tile
    tile_offsets = [[o for o in ifd[324] if o > 0] for ifd in ifds]
    first_tile = min(min(t) for t in tile_offsets if t)
    assert max(ifd["_end"] for ifd in ifds) < first_tile, f"{path.name}: an IFD lies after image data"
    # tile data of the smallest overview first, the full resolution last
    for finer, coarser in zip(tile_offsets, tile_offsets[1:]):
        if finer and coarser:
            assert max(coarser) < min(finer), f"{path.name}: overview tiles after finer tiles"
    # GDAL's structural-metadata ghost area right after the header (GDAL COG driver documentation)
    assert b"LAYOUT=IFDS_BEFORE_DATA" in data[:400], f"{path.name}: no COG ghost area"


def test_every_geotiff_is_a_cog_with_metadata(demo_run):
    _, out = demo_run
    tifs = sorted(out.glob("*.tif"))
    # five balance maps and snow_end, refreezing, redistribution per year, plus glacier_id and elevation
    assert len(tifs) == 8 * 8 + 2
    for tif in tifs:
        check_cog(tif)
        with rasterio.open(tif) as t:
            assert t.tags(ns="IMAGE_STRUCTURE").get("LAYOUT") == "COG"
            assert t.overviews(1), tif.name
            assert t.descriptions[0] and t.units[0]
            assert "firnline_version" in t.tags() and "caution" in t.tags() and "dem_sha256" in t.tags()
            assert t.compression.name.lower() == "deflate"
    with rasterio.open(out / "annual_balance_2020.tif") as t:
        assert t.nodata == -9999.0 and t.units[0] == "m w.e." and t.dtypes[0] == "float32"
        assert t.descriptions[0] == "annual surface mass balance, balance year 2020"
    with rasterio.open(out / "glacier_id.tif") as t:
        assert t.nodata == 0 and t.dtypes[0] == "int32"


def test_cog_check_rejects_a_plain_geotiff(tmp_path):
    """The layout check can fail: a striped GeoTIFF without overviews does not pass."""
    p = tmp_path / "plain.tif"
    with rasterio.open(p, "w", driver="GTiff", width=300, height=300, count=1, dtype="float32") as d:
        d.write(np.zeros((1, 300, 300), "float32"))
    with pytest.raises(AssertionError):
        check_cog(p)


# --------------------------------------------------------------------------
# NetCDF-CF
# --------------------------------------------------------------------------

CF_CALENDARS = {"standard", "gregorian", "proleptic_gregorian", "noleap", "365_day", "all_leap", "366_day",
                "360_day", "julian", "none"}                                       # CF 1.8 section 4.4.1
CF_METHODS = {"point", "sum", "maximum", "median", "mid_range", "minimum", "mean", "mode",
              "standard_deviation", "variance"}                                     # CF 1.8 Appendix E
CF_AREA_TYPES = {"land_ice", "land", "sea", "snow", "ice_free_land"}                # CF area-type table (from memory)
# CF standard name table (from memory): name -> canonical units
CF_STANDARD_NAMES = {"projection_x_coordinate": "m", "projection_y_coordinate": "m", "time": None,
                     "surface_altitude": "m", "land_ice_area_fraction": "1"}
UDUNITS_SYMBOLS = {"m", "kg", "s", "K", "1", "W", "d", "day", "mm", "km"}


def udunits_ok(text: str) -> bool:
    """A product of known UDUNITS symbols with integer powers ("m", "kg m-2", "W m-2"), CF 1.8 section 3.1."""
    return all(re.fullmatch(r"([A-Za-z]+|1)(\^?-?\d+)?", tok) and re.match(r"[A-Za-z]+|1", tok).group(0)
               in UDUNITS_SYMBOLS for tok in text.split())


def parse_cell_methods(text: str) -> list[tuple[list[str], str, str]]:
    """CF 1.8 section 7.3: 'name: [name: ...] method [where type] [over type] [(info)]' repeated."""
    text = re.sub(r"\([^)]*\)", "", text)            # remove the parenthesised information
    out = []
    pattern = re.compile(r"((?:[A-Za-z_][A-Za-z0-9_]*:\s*)+)([a-z_]+)((?:\s+(?:where|over)\s+[a-z_]+)*)")
    pos = 0
    for m in pattern.finditer(text):
        assert not text[pos:m.start()].strip(), f"unparsed cell_methods text {text[pos:m.start()]!r}"
        names = [n.strip() for n in m.group(1).split(":") if n.strip()]
        out.append((names, m.group(2), m.group(3).strip()))
        pos = m.end()
    assert not text[pos:].strip(), f"unparsed cell_methods text {text[pos:]!r}"
    return out


def test_balance_nc_follows_cf_1_8(demo_run):
    inp, out = demo_run
    with netCDF4.Dataset(out / "balance.nc") as nc:
        assert nc.getncattr("Conventions") == "CF-1.8"                              # 2.6.1
        dims = set(nc.dimensions)
        # coordinate variables (name = its one dimension): no _FillValue, no missing, monotonic (2.5.1, 5)
        for name in dims & set(nc.variables):
            v = nc.variables[name]
            assert "_FillValue" not in v.ncattrs() and "missing_value" not in v.ncattrs(), name
            vals = np.asarray(v[:])
            assert np.all(np.isfinite(vals)) and (np.all(np.diff(vals) > 0) or np.all(np.diff(vals) < 0))
        # the time axis of the balance years (4.4) with bounds (7.1)
        t = nc.variables["balance_year"]
        assert t.standard_name == "time" and t.axis == "T" and t.calendar in CF_CALENDARS
        time_units = r"(days|hours|minutes|seconds) since \d{4}-\d{2}-\d{2}( \d{2}:\d{2}(:\d{2})?)?"
        assert re.fullmatch(time_units, t.units)
        b = nc.variables[t.bounds]
        assert b.dimensions == ("balance_year", b.dimensions[1]) and b.shape == (8, 2)
        assert "_FillValue" not in b.ncattrs()
        for a in ("units", "calendar"):
            if a in b.ncattrs():
                assert b.getncattr(a) == t.getncattr(a)
        tv, bv = t[:], b[:]
        assert np.all(bv[:, 0] <= tv) and np.all(tv <= bv[:, 1])                     # value within its cell
        assert np.all(bv[1:, 0] == bv[:-1, 1])                                      # contiguous years
        starts = netCDF4.num2date(bv[:, 0], t.units, t.calendar)
        ends = netCDF4.num2date(bv[:, 1], t.units, t.calendar)
        # the fixed-date balance year: 1 October to 1 October (year_start "10-01"), labelled by its end
        assert [(s.year, s.month, s.day) for s in starts] == [(y - 1, 10, 1) for y in range(2017, 2025)]
        assert [(e.year, e.month, e.day) for e in ends] == [(y, 10, 1) for y in range(2017, 2025)]
        assert [d.year for d in netCDF4.num2date(tv, t.units, t.calendar)] == list(range(2017, 2025))
        # x and y (4.1-4.2 via standard names; 5.6 grid mapping)
        assert nc.variables["x"].axis == "X" and nc.variables["y"].axis == "Y"
        for name, v in nc.variables.items():
            attrs = v.ncattrs()
            if "standard_name" in attrs:                                             # 3.3
                assert v.standard_name in CF_STANDARD_NAMES, v.standard_name
                canonical = CF_STANDARD_NAMES[v.standard_name]
                if canonical is not None:
                    assert v.units == canonical, name
            if "units" in attrs and name != "balance_year":                          # 3.1
                assert udunits_ok(v.units), (name, v.units)
            if "grid_mapping" in attrs:                                              # 5.6
                gm = nc.variables[v.grid_mapping]
                assert gm.grid_mapping_name == "transverse_mercator"
                with rasterio.open(inp / "dem.tif") as dem:
                    assert CRS.from_cf({a: gm.getncattr(a) for a in gm.ncattrs()}) == CRS.from_wkt(dem.crs.to_wkt())
            if "cell_methods" in attrs:                                              # 7.3
                std = {nc.variables[d].standard_name for d in v.dimensions
                       if d in nc.variables and "standard_name" in nc.variables[d].ncattrs()}
                for names, method, extra in parse_cell_methods(v.cell_methods):
                    assert method in CF_METHODS
                    for n in names:
                        assert n in v.dimensions or n in std or n == "area", (name, n)
                    for kind, value in re.findall(r"(where|over)\s+([a-z_]+)", extra):
                        assert value in CF_AREA_TYPES
        for name in ("annual_balance", "winter_balance", "summer_balance", "accumulation", "ablation"):
            v = nc.variables[name]
            assert v.dimensions == ("balance_year", "y", "x")                       # 2.4 order T, Y, X
            assert v.units == "m" and "water equivalent" in v.long_name and "m w.e." in v.comment
            methods = parse_cell_methods(v.cell_methods)
            assert (["time"], "sum", "") in methods
        assert "where land_ice" in nc.variables["annual_balance"].cell_methods


def test_cf_checks_can_fail():
    """The hand-written checks reject what CF 1.8 rejects."""
    assert not udunits_ok("m w.e.")
    assert udunits_ok("kg m-2") and udunits_ok("m") and udunits_ok("1")
    with pytest.raises(AssertionError):
        parse_cell_methods("time: sum sometimes")
    assert parse_cell_methods("time: sum (comment: x) area: mean where land_ice") == [
        (["time"], "sum", ""), (["area"], "mean", "where land_ice")]


# --------------------------------------------------------------------------
# glaciers.gpkg and glacier_id.tif names
# --------------------------------------------------------------------------

def _layer(path, name):
    meta, _, geom, fields = read_layer(path, layer=name)
    df = pd.DataFrame({c: f for c, f in zip(meta["fields"], fields)})
    return meta, df, [None if g is None else shapely.from_wkb(g) for g in geom]


def test_geopackage_joins_to_the_outlines_and_the_id_raster(demo_run):
    inp, out = demo_run
    gpkg = out / "glaciers.gpkg"
    assert {"outlines", "glacier_years", "ela_lines"} <= {n for n, _ in list_layers(gpkg)}
    meta, g, geoms = _layer(gpkg, "outlines")
    assert CRS.from_user_input(meta["crs"]) == CRS.from_epsg(32632)
    lookup = json.loads((out / "run.json").read_text())["glacier_lookup"]
    assert {str(i): n for i, n in zip(g.glacier_id, g.glacier)} == lookup
    # the outlines are the input outlines (same shape in the same CRS here) and each covers the cells
    # that glacier_id.tif gives its id
    with rasterio.open(out / "glacier_id.tif") as t:
        ids = t.read(1)
        rows, cols = np.nonzero(ids)
        xs, ys = rasterio.transform.xy(t.transform, rows, cols)
    for gid, geom in zip(g.glacier_id, geoms):
        sel = ids[rows, cols] == gid
        inside = shapely.contains_xy(geom.buffer(30.0), np.asarray(xs)[sel], np.asarray(ys)[sel])
        assert inside.mean() > 0.99
    # per-year results join by glacier_id and agree with summary.csv
    _, y, ygeoms = _layer(gpkg, "glacier_years")
    s = pd.read_csv(out / "summary.csv")
    s = s[s.glacier != "all_glaciers"]
    j = y.merge(g[["glacier_id", "glacier"]], on="glacier_id", suffixes=("", "_outline"))
    assert len(j) == len(s) == 24 and (j.glacier == j.glacier_outline).all()
    m = j.merge(s, on=["glacier", "balance_year"], suffixes=("", "_csv"))
    np.testing.assert_allclose(m.annual_balance_mwe, m.annual_balance_mwe_csv, rtol=1e-5)
    assert all(gm is not None and gm.area > 0 for gm in ygeoms)
    # ELA lines: one per glacier and year with the ELA on the glacier, at that height on the DEM
    _, e, lines = _layer(gpkg, "ela_lines")
    ok = s[s.ela_flag == "ok"]
    assert len(e) == len(ok)
    with rasterio.open(inp / "dem.tif") as dem:
        z = dem.read(1)
        for row, line in zip(e.itertuples(), lines):
            pts = shapely.get_coordinates(line)
            r, c = rasterio.transform.rowcol(dem.transform, pts[:, 0], pts[:, 1])
            near = z[np.clip(r, 0, z.shape[0] - 1), np.clip(c, 0, z.shape[1] - 1)]
            assert abs(np.median(near) - row.ela_m) < 30.0                        # within a cell's relief


def test_glacier_id_names_sidecar_is_read_by_gdal(demo_run):
    _, out = demo_run
    lookup = json.loads((out / "run.json").read_text())["glacier_lookup"]
    root = ET.parse(out / "glacier_id.tif.aux.xml").getroot()
    band = root.find("PAMRasterBand")
    assert band.get("band") == "1"
    cats = [c.text for c in band.find("CategoryNames")]
    assert cats[0] == "no glacier" and {str(i): n for i, n in enumerate(cats) if i} == lookup
    rat = band.find("GDALRasterAttributeTable")
    fields = [f.find("Name").text for f in rat.findall("FieldDefn")]
    assert fields == ["value", "glacier"]
    rows = {int(r.findall("F")[0].text): r.findall("F")[1].text for r in rat.findall("Row")}
    assert {str(k): v for k, v in rows.items() if k} == lookup
    with rasterio.open(out / "glacier_id.tif") as t:     # GDAL merges the sidecar's band metadata
        assert json.loads(t.tags(1)["glacier_names"]) == lookup


# --------------------------------------------------------------------------
# tables
# --------------------------------------------------------------------------

def test_summary_has_all_glaciers_rows_and_gradient_and_plain_numbers(demo_run):
    _, out = demo_run
    text = (out / "summary.csv").read_text()
    s = pd.read_csv(out / "summary.csv")
    tot = s[s.glacier == "all_glaciers"].set_index("balance_year")
    g = s[s.glacier != "all_glaciers"]
    assert list(tot.index) == list(range(2017, 2025))
    for year, rows in g.groupby("balance_year"):
        w = rows.area_km2
        assert tot.loc[year, "area_km2"] == pytest.approx(w.sum(), rel=1e-5)
        for c in ("annual_balance_mwe", "winter_balance_mwe", "summer_balance_mwe", "aar"):
            assert tot.loc[year, c] == pytest.approx((rows[c] * w).sum() / w.sum(), rel=1e-5, abs=1e-6)
    assert tot.ela_m.isna().all()
    # the gradient of the ablation area (firnline.metrics): none in a year without one (below_glacier),
    # and none where the ablation area spans fewer than two bands (tarn 2024 on the demo)
    grad = g.ablation_gradient_mwe_per_100m
    assert grad[g.ela_flag == "below_glacier"].isna().all()
    assert grad[g.ela_flag == "ok"].notna().mean() > 0.9
    # balance grows with elevation in the ablation area (common practice), except where sliding snow
    # feeds a tongue from the walls above it (kessel in its positive years): most glacier-years
    assert (grad.dropna() > 0).mean() > 0.8
    assert (g[g.glacier != "kessel"].ablation_gradient_mwe_per_100m.dropna() > 0).all()
    for csv in out.glob("*.csv"):
        assert not re.search(r"\d[eE][+-]?\d", csv.read_text()), f"scientific notation in {csv.name}"
    assert "e-0" not in text


def test_plain_numbers_in_csv(tmp_path):
    from firnline.outputs import plain_number, write_csv
    assert plain_number(1.23456789e-5) == "0.0000123457"
    assert plain_number(12345678.9) == "12345679"
    assert plain_number(-0.5) == "-0.5" and plain_number(3.0) == "3"
    write_csv(tmp_path / "t.csv", pd.DataFrame({"a": [1.5e-7, 2.5e8, np.nan]}))
    assert (tmp_path / "t.csv").read_text().splitlines() == ["a", "0.00000015", "250000000", "\"\""]


def test_plain_numbers_of_a_column_are_plain_number_of_each_value():
    from firnline.outputs import plain_number, plain_numbers
    rng = np.random.default_rng(0)
    x = np.concatenate([rng.normal(0, 1, 5000) * 10.0 ** rng.integers(-9, 9, 5000),
                        [0.0, -0.0, np.nan, np.inf, 9.9999996, 99999.95, -4e-7, 12345678.9, 0.15, 2.5]])
    for digits in (3, 6, 8):
        assert list(plain_numbers(x, digits)) == [plain_number(v, digits) for v in x]


def test_one_unit_spelling(demo_run):
    """m w.e. is written one way in every text output (no "mwe", "m we", "m.w.e.")."""
    _, out = demo_run
    for name in ("report.html", "run.json"):
        text = (out / name).read_text()
        assert not re.search(r"\bm\.? ?we\b|m\.w\.e\.|\bmwe\b", text.replace("_mwe", "")), name
    assert "m w.e." in (out / "report.html").read_text()
