"""``firnline demo [DIR]``: write the invented Seldra demo inputs and a config into DIR."""

from __future__ import annotations

from pathlib import Path

from .common import say


def add_parser(sub) -> None:
    p = sub.add_parser("demo", help="write the demo inputs and a config into DIR",
                       description="Write the invented Seldra catchment (DEM, outlines, station "
                                   "record, observations) and demo.toml into DIR; then run "
                                   "`firnline run DIR/demo.toml`.")
    p.add_argument("dir", nargs="?", default="firnline-demo", metavar="DIR",
                   help="folder to write into (default: firnline-demo)")
    p.add_argument("--quiet", action="store_true", help="no notes")
    p.set_defaults(func=main)


def main(args) -> int:
    from ..demo import write_demo

    folder = Path(args.dir)
    cfg = write_demo(folder)
    say(args, f"wrote the demo into {folder}; run: firnline run {cfg}")
    return 0
