"""``firnline terrain CONFIG``: slope, aspect and (later) the radiation climatology."""

from __future__ import annotations

from .common import add_common, config_and_out, say


def add_parser(sub) -> None:
    p = sub.add_parser("terrain", help="write slope and aspect of the DEM",
                       description="Write slope.tif and aspect.tif (Horn 1981) of the configured DEM.")
    add_common(p)
    p.set_defaults(func=main)


def main(args) -> int:
    from ..grid import read_dem
    from ..outputs import staged, write_geotiff
    from ..terrain import slope_aspect

    cfg, out = config_and_out(args)
    grid = read_dem(cfg.dem.path)
    for note in grid.notes:
        say(args, note)
    slope, aspect = slope_aspect(grid.elevation, *grid.cell_size_m)
    tags = {"dem_sha256": grid.checksum}
    with staged(out) as st:
        write_geotiff(st.path("slope.tif"), slope, grid.transform, grid.crs,
                      ["slope angle (Horn 1981)"], "degree", tags)
        write_geotiff(st.path("aspect.tif"), aspect, grid.transform, grid.crs,
                      ["aspect, clockwise from north (NaN on flat cells)"], "degree", tags)
    say(args, f"wrote {', '.join(st.names)} to {out}")
    return 0
