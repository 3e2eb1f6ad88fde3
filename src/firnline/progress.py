"""The one progress protocol of firnline.

A progress callback is ``progress(label, done, total)``: ``label`` names the step (for
example ``"days"`` or ``"horizon sectors"``), ``done`` counts the finished units of
``total``. Every long-running function takes ``progress=None`` and calls it after each
unit; the command line passes one that draws a tqdm bar per label
(:func:`firnline.cli.common.progress_bars`). ``None`` means no reports.
"""

from __future__ import annotations

from typing import Callable, Optional

Progress = Optional[Callable[[str, int, int], None]]


def stage(progress: Progress, label: str, total: int) -> Callable[[int], None] | None:
    """A ``callback(done)`` reporting one step of known size, or None without ``progress``."""
    if progress is None:
        return None
    return lambda done: progress(label, int(done), int(total))
