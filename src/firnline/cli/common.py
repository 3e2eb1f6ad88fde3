"""Helpers shared by the commands: progress bars, console notes, the config argument."""

from __future__ import annotations

import sys
from pathlib import Path

from ..config import load_config


def add_common(p, out=True) -> None:
    p.add_argument("config", metavar="CONFIG", help="the run's TOML config file")
    if out:
        p.add_argument("--out", metavar="DIR", help="output folder (default: [output] dir of the config)")
    p.add_argument("--quiet", action="store_true", help="no progress bars or notes")


def progress_factory(quiet: bool):
    """A factory (label, total) -> callback(done) drawing tqdm bars on a terminal, else None."""
    if quiet or not sys.stderr.isatty():
        return None
    from tqdm import tqdm

    def make(label: str, total: int):
        bar = tqdm(total=total, desc=label, unit=label.split()[-1] if label else "it",
                   leave=False, file=sys.stderr, dynamic_ncols=True)
        state = {"n": 0}

        def update(done: int) -> None:
            bar.update(done - state["n"])
            state["n"] = done
            if done >= total:
                bar.close()
        return update
    return make


def say(args, text: str) -> None:
    """A note on stderr unless --quiet."""
    if not getattr(args, "quiet", False):
        print(text, file=sys.stderr)


def config_and_out(args):
    cfg = load_config(args.config)
    out = Path(args.out) if getattr(args, "out", None) else cfg.output.dir
    return cfg, out
