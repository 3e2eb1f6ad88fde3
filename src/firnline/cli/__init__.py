"""Command line: one small module per command (``firnline COMMAND --help``).

Exit status: 0 success, 2 bad input or config (one sentence on stderr, no
traceback), 1 unexpected error.
"""

from __future__ import annotations

import argparse
import sys
import traceback

from .. import __version__
from ..errors import InputError
from . import calibrate as calibrate_cmd
from . import demo as demo_cmd
from . import run as run_cmd
from . import scenarios as scenarios_cmd
from . import terrain as terrain_cmd

COMMANDS = [run_cmd, terrain_cmd, scenarios_cmd, calibrate_cmd, demo_cmd]


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="firnline",
        description="Distributed surface mass balance of glacierised catchments: balance maps, "
                    "ELA and AAR from a DEM and a daily station record.")
    p.add_argument("--version", action="version", version=f"firnline {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    for mod in COMMANDS:
        mod.add_parser(sub)
    return p


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except InputError as e:
        print(f"firnline: {e}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("firnline: interrupted; no output was written.", file=sys.stderr)
        return 1
    except Exception:  # unexpected: show where, for a bug report
        traceback.print_exc()
        print("firnline: unexpected error (a bug); please report it with the lines above.", file=sys.stderr)
        return 1


def entry() -> None:
    sys.exit(main())
