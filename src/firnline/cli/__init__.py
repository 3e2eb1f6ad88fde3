"""Command line: one small module per command (``firnline COMMAND --help``).

Exit status: 0 success, 2 bad input or config (one sentence on stderr, no
traceback), 1 unexpected error, 130 / 143 interrupted by SIGINT / SIGTERM (the
message says whether the output folder holds the earlier or the new set).
"""

from __future__ import annotations

import argparse
import contextlib
import signal
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


class Interrupted(BaseException):
    """SIGTERM or SIGHUP arrived (SIGINT arrives as KeyboardInterrupt)."""

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum


def _raise_interrupted(signum, frame):
    raise Interrupted(signum)


def _quiet_gdal() -> None:
    """GDAL's messages reach Python logging through rasterio; errors become exceptions
    that the commands turn into one sentence, so the log lines are not shown as well."""
    import logging

    for name in ("rasterio", "fiona", "pyogrio"):
        logger = logging.getLogger(name)
        if not logger.handlers:
            logger.addHandler(logging.NullHandler())


def main(argv: list[str] | None = None) -> int:
    from .. import outdir

    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help()
        return 2
    _quiet_gdal()
    outdir.STATE.update(folder=None, had_old=False, committed=False)
    previous = {}
    for signum in (getattr(signal, "SIGTERM", None), getattr(signal, "SIGHUP", None)):
        if signum is not None:
            with contextlib.suppress(ValueError, OSError):   # not the main thread: leave as is
                if signal.getsignal(signum) is not signal.SIG_IGN:   # nohup and the like: respected
                    previous[signum] = signal.signal(signum, _raise_interrupted)
    try:
        return int(args.func(args) or 0)
    except InputError as e:
        print(f"firnline: {e}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"firnline: {outdir.interruption_message()}", file=sys.stderr)
        return 128 + signal.SIGINT
    except Interrupted as e:
        print(f"firnline: {outdir.interruption_message()}", file=sys.stderr)
        return 128 + e.signum
    except Exception:  # unexpected: show where, for a bug report
        traceback.print_exc()
        print("firnline: unexpected error (a bug); please report it with the lines above.", file=sys.stderr)
        return 1
    finally:
        for signum, handler in previous.items():
            with contextlib.suppress(ValueError, OSError, TypeError):
                signal.signal(signum, handler)


def entry() -> None:
    sys.exit(main())
