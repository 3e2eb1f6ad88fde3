"""``firnline terrain CONFIG``: slope, aspect and the potential direct radiation climatology."""

from __future__ import annotations

from .common import add_common, config_and_out, progress_factory, say


def add_parser(sub) -> None:
    p = sub.add_parser("terrain", help="write slope, aspect and potential direct radiation of the DEM",
                       description="Write slope.tif and aspect.tif (Horn 1981), radiation_monthly.tif "
                                   "(12 bands: mean daily potential clear-sky direct radiation per "
                                   "calendar month, W m-2) and radiation_annual.tif of the configured "
                                   "DEM; horizon.tif too with [radiation] write_horizons = true. The "
                                   "radiation climatology is cached and reused by every run.")
    add_common(p)
    p.set_defaults(func=main)


def main(args) -> int:
    from ..grid import read_dem
    from ..model import radiation_climatology
    from ..products import write_terrain
    from ..terrain import slope_aspect

    cfg, out = config_and_out(args)
    grid = read_dem(cfg.dem.path)
    for note in grid.notes:
        say(args, note)
    slope, aspect = slope_aspect(grid.elevation, *grid.cell_size_m)
    table, horizons, note = radiation_climatology(grid, slope, aspect, cfg, progress_factory(args.quiet),
                                                  want_horizons=cfg.radiation.write_horizons)
    say(args, note)
    files = write_terrain(cfg, grid, slope, aspect, table, horizons if cfg.radiation.write_horizons else None, out)
    say(args, f"wrote {', '.join(f.name for f in files)} to {out}")
    return 0
