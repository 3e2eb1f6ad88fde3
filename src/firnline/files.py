"""Input files must be regular files: a FIFO, a device or a folder is refused at once.

Reading a FIFO blocks until something writes into it, and a character device such as
``/dev/zero`` never ends; both would hang or exhaust memory instead of failing, so every
input is checked with :func:`regular_file` before it is opened.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path

from .errors import InputError


def regular_file(path, what: str, key: str | None = None) -> Path:
    """``path`` as a Path if it names a regular file (or a link to one), else InputError.

    Parameters
    ----------
    path : path-like
    what : str
        What the file is, for the message ("station file", "DEM", ...).
    key : str, optional
        The config key that names it ("[climate] station_file"), for the message.
    """
    p = Path(path)
    where = f" (set by {key})" if key else ""
    try:
        st = os.stat(p)
    except FileNotFoundError:
        raise InputError(f"{p}: {what} not found{where}; check the path.") from None
    except NotADirectoryError:
        raise InputError(f"{p}: {what} not found{where}: a part of the path is a file, not a folder.") from None
    except OSError as e:
        raise InputError(f"{p}: cannot read the {what}{where} ({e.strerror}).") from None
    if stat.S_ISREG(st.st_mode):
        return p
    kind = ("a folder" if stat.S_ISDIR(st.st_mode) else "a FIFO (named pipe)" if stat.S_ISFIFO(st.st_mode)
            else "a device" if stat.S_ISCHR(st.st_mode) or stat.S_ISBLK(st.st_mode)
            else "a socket" if stat.S_ISSOCK(st.st_mode) else "not a regular file")
    raise InputError(f"{p}: the {what}{where} is {kind}, not a file; give the path of the file itself.")


def read_text(path, what: str, missing_fix: str, unreadable_fix: str = "", key: str | None = None,
              encoding: str = "utf-8") -> str:
    """The text of an input file (a regular file: see :func:`regular_file`), or an InputError.

    Parameters
    ----------
    path : Path
    what : str
        What the file is, for the message (e.g. ``"config file"``).
    missing_fix, unreadable_fix : str
        What to do when the file is missing, or cannot be read as text.
    key : str, optional
        The config key that names it, for the message.
    encoding : str
    """
    path = Path(path)
    if path.exists():
        regular_file(path, what, key)   # a FIFO or a device would hang or fill the memory
    try:
        return path.read_text(encoding=encoding)
    except FileNotFoundError:
        raise InputError(f"{path}: {what} not found; {missing_fix}.") from None
    except (OSError, UnicodeDecodeError) as e:
        fix = f"; {unreadable_fix}" if unreadable_fix else ""
        raise InputError(f"{path.name}: cannot read the {what} ({e}){fix}.") from None

