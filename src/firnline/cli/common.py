"""Helpers shared by the commands: progress bars, console notes, the config argument."""

from __future__ import annotations

import sys
from pathlib import Path

from ..config import load_config
from ..errors import InputError

#: How the command line names the scenario lists (for the messages of firnline.scenarios).
SCENARIO_OPTIONS = ("--warming", "--precip-change")


def add_command(sub, name: str, help: str, description: str, main):
    """A command's parser with the config argument, ``--out``, ``--force`` and ``--quiet``; returns it."""
    p = sub.add_parser(name, help=help, description=description)
    p.add_argument("config", metavar="CONFIG", help="the run's TOML config file")
    p.add_argument("--out", metavar="DIR", help="output folder (default: [output] dir of the config); "
                   "it must be new, empty or hold only earlier firnline outputs, which are replaced")
    p.add_argument("--force", action="store_true",
                   help="write into an output folder that also holds other files (they are kept; "
                        "never overwrites an input of the run)")
    p.add_argument("--quiet", action="store_true", help="no progress bars or notes")
    p.set_defaults(func=main)
    return p


def progress_bars(quiet: bool):
    """A progress callback (label, done, total) drawing one tqdm bar per label on a terminal, else None.

    See :mod:`firnline.progress` for the protocol.
    """
    if quiet or not sys.stderr.isatty():
        return None
    from tqdm import tqdm

    bars: dict = {}

    def report(label: str, done: int, total: int) -> None:
        if label not in bars:
            bars[label] = tqdm(total=total, desc=label, unit=label.split()[-1] if label else "it",
                               leave=False, file=sys.stderr, dynamic_ncols=True)
        bar = bars[label]
        bar.update(done - bar.n)
        if done >= total:
            bar.close()
            del bars[label]
    return report


def say(args, *texts: str) -> None:
    """Notes on stderr (one a line) unless --quiet."""
    if not getattr(args, "quiet", False):
        for text in texts:
            print(text, file=sys.stderr)


def wrote(args, files, out, then: str = "") -> None:
    """The closing notes of a command that writes model results: what went where, and the caution."""
    from ..provenance import CAUTION

    say(args, f"wrote {len(files)} files to {out}{then}", CAUTION)


def config_and_out(args):
    if getattr(args, "out", None) is not None and not str(args.out).strip():
        raise InputError("--out is empty; give the output folder's path, or leave --out out to use "
                         "[output] dir of the config.")
    cfg = load_config(args.config)
    out = Path(args.out) if getattr(args, "out", None) else cfg.output.dir
    return cfg, out


def input_paths(cfg) -> list[Path]:
    """Every input file a config names (the config itself included), for the output-folder checks."""
    paths = [cfg.source] if cfg.source else []
    for section in ("dem", "glaciers", "climate", "observations", "runoff"):
        sec = getattr(cfg, section, None)
        if sec is None:
            continue
        fields = getattr(sec, "__dataclass_fields__", {})
        for name in fields:
            value = getattr(sec, name, None)
            if isinstance(value, Path) and name not in ("dir", "cache_dir"):
                paths.append(value)
    return paths


def claim_output(args, cfg, out: Path, command: str, scenarios: int = 1, extra_inputs=(), streamed: bool = False):
    """Check the inputs, the memory and the output folder, then lock it; all before any computation.

    ``extra_inputs`` are input files named on the command line rather than in the config
    (they too must be regular files and may not lie in the output folder). Returns the
    claimed :class:`firnline.outdir.OutputFolder` (a context manager). ``streamed``: the command's
    per-year maps are streamed (``firnline run``; :func:`firnline.budget.estimate`).
    """
    from .. import budget
    from ..files import regular_file
    from ..outdir import claim

    inputs = input_paths(cfg) + [Path(p) for p in extra_inputs]
    for p in inputs:
        if p.exists():            # a missing file is named by its reader, with its key
            regular_file(p, "input file")
    budget.check_run(cfg, scenarios, streamed=streamed)
    return claim(out, command, inputs=inputs, force=getattr(args, "force", False),
                 cache_dir=cfg.radiation.cache_dir)
