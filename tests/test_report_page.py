"""report.html and its figures (issue 15): every figure is there at its size, the page holds
every glacier and year, embeds its figures and loads nothing from anywhere else."""

from __future__ import annotations

import base64
import re
from html.parser import HTMLParser

import pandas as pd
import pytest

from firnline.cli import main
from firnline.page import Page, png_size


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags, self.h3, self.cells, self._in, self._cell = [], [], [], None, None

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        if tag in ("h3", "td"):
            self._in, self._cell = tag, ""

    def handle_data(self, data):
        if self._in:
            self._cell += data

    def handle_endtag(self, tag):
        if tag == self._in:
            (self.h3 if tag == "h3" else self.cells).append(self._cell.strip())
            self._in = None


def _parse(path):
    p = _Collect()
    p.feed(path.read_text(encoding="utf-8"))
    return p


def test_every_figure_exists_at_its_size(demo_run):
    _, out = demo_run
    years = list(range(2017, 2025))
    maps = sorted(out.glob("map_*.png"))
    # the demo's catchment is drawn at full resolution (320 x 300 cells, under the 400-cell limit),
    # so no glacier needs a map of its own: one catchment map per year and the record mean
    assert [m.name for m in maps] == sorted([f"map_catchment_{y}.png" for y in years] + ["map_catchment_mean.png"])
    charts = sorted(p.name for p in out.glob("chart_*.png"))
    assert charts == ["chart_all_glaciers.png", "chart_hydrograph.png", "chart_kessel.png",
                      "chart_north_seldra.png", "chart_tarn.png"]
    for m in maps:
        png = m.read_bytes()
        w, h = png_size(png)
        # three panels of 3.6 in and the colour bar at 100 dpi; the height follows the DEM's aspect
        assert w == 1200 and 300 * 3.6 / 320 * 100 + 90 <= h <= 300 * 3.6 / 320 * 100 + 120, (m.name, w, h)
        assert len(png) > 50_000, m.name          # a drawn map, not an empty canvas
    for c in charts:
        png = (out / c).read_bytes()
        if c != "chart_hydrograph.png":    # its size: tests/test_runoff_run.py
            assert png_size(png) == ((800, 360) if c == "chart_all_glaciers.png" else (1150, 640)), c
        assert len(png) > 20_000, c


def test_report_holds_every_glacier_year_figure_and_input(demo_run):
    inp, out = demo_run
    page = _parse(out / "report.html")
    text = (out / "report.html").read_text(encoding="utf-8")
    s = pd.read_csv(out / "summary.csv")
    for g in ("north_seldra", "kessel", "tarn"):
        assert g in page.h3
        rows = s[s.glacier == g]
        for r in rows.itertuples():                     # each year's row with its balance, rounded
            assert str(r.balance_year) in page.cells and f"{r.annual_balance_mwe:.2f}" in page.cells
    assert "All glaciers (area-weighted)" in page.h3
    imgs = [a for t, a in page.tags if t == "img"]
    figures = sorted(out.glob("map_*.png")) + sorted(out.glob("chart_*.png"))
    assert len(imgs) == len(figures)
    embedded = {base64.b64decode(a["src"].split(",", 1)[1]) for a in imgs}
    assert embedded == {f.read_bytes() for f in figures}      # the very files, embedded
    for a in imgs:
        assert a["src"].startswith("data:image/png;base64,") and a.get("alt")
    # inputs with checksums, parameters with their source, the caution
    import json
    info = json.loads((out / "run.json").read_text())
    for sha in info["input_sha256"].values():
        assert sha in page.cells
    assert "[melt] ddf_snow_mm_per_day_k" in page.cells and "config" in page.cells
    assert "[balance] band_width_m" in page.cells
    assert "qualified practitioners" in text and "model estimates" in text


def test_report_is_self_contained(demo_run):
    _, out = demo_run
    text = (out / "report.html").read_text(encoding="utf-8")
    page = _parse(out / "report.html")
    for tag, attrs in page.tags:
        assert tag not in ("link", "iframe", "object", "embed", "script"), tag
        for k in ("src", "href"):
            v = attrs.get(k)
            if v is not None:
                assert v.startswith("data:") or v.startswith("#"), (tag, k, v[:60])
    css = " ".join(re.findall(r"<style>(.*?)</style>", text, flags=re.S))
    assert "url(" not in css and "@import" not in css
    assert "@media print" in css


def test_parameter_sources_say_config_default_or_calibration(tmp_path):
    """A key written in the config is "config", one left out "default", and a fitted key of a
    calibrated.toml "calibration"."""
    from firnline import load_config
    from firnline.demo import write_demo
    from firnline.documents import parameter_sources

    cfg_path = write_demo(tmp_path / "d")
    text = cfg_path.read_text().replace("ddf_ice_mm_per_day_k = 6.0", "# ddf_ice_mm_per_day_k = 6.0")
    text = text.replace("ddf_snow_mm_per_day_k = 3.0", "ddf_snow_mm_per_day_k = 3.5")
    cfg_path.write_text("# Written by firnline 0 calibrate from x.\n# Fitted: ddf_snow_mm_per_day_k = 3.5.\n" + text)
    t = parameter_sources(load_config(cfg_path)).set_index("setting")
    assert t.loc["[melt] ddf_snow_mm_per_day_k", "source"] == "calibration"
    assert t.loc["[melt] ddf_snow_mm_per_day_k", "equals default"] == "no"
    assert t.loc["[melt] ddf_ice_mm_per_day_k", "source"] == "default"
    assert t.loc["[melt] threshold_c", "source"] == "config"


def test_no_report_skips_page_and_figures(plane_case, tmp_path):
    cfg = plane_case()
    out = tmp_path / "o"
    assert main(["run", str(cfg), "--out", str(out), "--quiet", "--no-report"]) == 0
    names = {p.name for p in out.iterdir()}
    assert "summary.csv" in names and "glaciers.gpkg" in names
    assert "report.html" not in names and not any(n.endswith(".png") for n in names)
    out2 = tmp_path / "o2"
    assert main(["run", str(cfg), "--out", str(out2), "--quiet"]) == 0
    assert (out2 / "report.html").exists() and list(out2.glob("map_*.png"))


def test_page_escapes_text():
    html = Page("a <b>", caution="c & d").paragraph("<script>x</script>").render()
    assert "<script>" not in html and "&lt;script&gt;" in html and "a &lt;b&gt;" in html


def test_png_size_rejects_other_files():
    with pytest.raises(ValueError):
        png_size(b"GIF89a" + b"\0" * 30)
