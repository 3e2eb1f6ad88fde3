"""``firnline terrain CONFIG``: slope, aspect and the potential direct radiation climatology."""

from __future__ import annotations

from .common import add_command, claim_output, config_and_out, progress_bars, say


def add_parser(sub) -> None:
    add_command(sub, "terrain", "write slope, aspect and potential direct radiation of the DEM",
                "Write slope.tif and aspect.tif (Horn 1981), radiation_monthly.tif (12 bands: mean "
                "daily potential clear-sky direct radiation per calendar month, W m-2) and "
                "radiation_annual.tif of the configured DEM; horizon.tif too with [radiation] "
                "write_horizons = true. The radiation climatology is cached and reused by every run.",
                main)


def main(args) -> int:
    from ..model import terrain

    cfg, out = config_and_out(args)
    with claim_output(args, cfg, out, "terrain"):
        result = terrain(cfg, progress_bars(args.quiet))
        say(args, *result.notes)
        files = result.write(out)
    say(args, f"wrote {', '.join(f.name for f in files)} to {out}")
    return 0
