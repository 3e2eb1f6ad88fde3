"""The output folder a command owns: checks, lock, staging and the all-or-nothing swap.

A command writes into an output folder ``OUT`` like this:

1. **Checks, before any computation** (:meth:`OutputFolder.check`): the path is a folder
   or can become one (not a file, not under a file, names not too long, not a mount
   point, not read-only), no input of the run lies inside it, and it holds nothing
   but files that earlier firnline runs wrote there. Those are listed, with size and
   modification time, in the folder's manifest :data:`MANIFEST`; anything else (a
   file no firnline run wrote, or a listed file changed since) is refused unless
   ``--force`` is given, and even then it is kept, never deleted. Output folders of
   other firnline commands nested inside ``OUT`` (``out/scenarios``, ...) are kept too.
2. **A lock** ``.OUT.firnline-lock`` beside the folder holds the process id of the
   run writing into it; a second run into the same folder (or into a folder nested
   in it, or around it) is refused while the holder lives, and a lock left by a dead
   process is taken over.
3. **Leftovers** of a killed run (staging folders beside ``OUT``, an earlier set not
   yet removed, cache ``.tmp`` files of dead processes) are cleared by the next run.
4. **Staging**: the whole new set is written into a sibling folder
   ``.OUT.firnline-staging-<pid>-<random>`` (same file system as ``OUT``). Entries of
   ``OUT`` that are kept (nested output folders, the user's files with ``--force``)
   are hard-linked into it (copied where links are impossible), so the old folder
   stays complete.
5. **The swap**: with SIGINT, SIGTERM and SIGHUP held back, the staging folder and
   ``OUT`` are exchanged in one ``renameat2(RENAME_EXCHANGE)`` call where Linux offers
   it, otherwise by two renames (``OUT`` to ``.OUT.firnline-old-...``, staging to
   ``OUT``); a run killed between those two is repaired by the next run. The earlier
   set is deleted only after the swap. A signal that arrived during the swap is acted
   on after it, so an interrupted run leaves either the complete earlier set or the
   complete new set, and :func:`interruption_message` says which.

Tests can pause a run at named points (:func:`pause_point`) by setting
``FIRNLINE_PAUSE_DIR`` to a folder: at point ``P`` the run creates ``P.reached``
there and, if ``P.go`` is a FIFO, waits until something is written into it.
"""

from __future__ import annotations

import contextlib
import ctypes
import datetime as dt
import errno
import json
import os
import secrets
import shutil
import signal
import socket
import stat
import sys
import tempfile
from pathlib import Path
from typing import Iterable, Iterator

from . import __version__
from .errors import InputError

MANIFEST = ".firnline-manifest.json"
"""Name of the manifest inside an output folder (JSON, see :func:`read_manifest`)."""
MANIFEST_FORMAT = 1
WORK_TAG = ".firnline-"       # sibling work entries: .OUT.firnline-lock, -staging-*, -old-*, -maps-*
LONGEST_SUFFIX = len(".firnline-staging-4294967295-0123456789ab") + 1
CLUTTER = {".DS_Store", "Thumbs.db", "desktop.ini"}   # written by file browsers; kept as they are
DERIVED_SUFFIXES = (".aux.xml", ".ovr", ".msk")         # GDAL sidecars of our rasters: replaced
PAUSE_ENV = "FIRNLINE_PAUSE_DIR"
SIGNALS = tuple(s for s in (getattr(signal, n, None) for n in ("SIGINT", "SIGTERM", "SIGHUP")) if s)

# what happened to the folder of the command now running (for the message on interruption)
STATE: dict = {"folder": None, "had_old": False, "committed": False}
_ACTIVE: dict[str, "OutputFolder"] = {}


# ----------------------------------------------------------------------------
# small helpers
# ----------------------------------------------------------------------------

def pause_point(name: str) -> None:
    """Test hook: announce point ``name`` and wait on ``name.go`` if it is a FIFO (see module doc)."""
    folder = os.environ.get(PAUSE_ENV)
    if not folder:
        return
    Path(folder, f"{name}.reached").write_text(str(os.getpid()))
    go = Path(folder, f"{name}.go")
    if go.is_fifo():
        with open(go, "rb") as f:
            f.read()


def pid_alive(pid: int) -> bool:
    """True if a process with this id exists on this machine (or we may not ask)."""
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    except OSError:
        return False
    return True


def _start_time(pid: int) -> str | None:
    """Start time of a process in clock ticks since boot (Linux), to tell a reused pid."""
    try:
        text = Path(f"/proc/{pid}/stat").read_text()
        return text.rsplit(")", 1)[1].split()[19]
    except (OSError, IndexError):
        return None


def _is_no_space(exc: BaseException) -> bool:
    if isinstance(exc, OSError) and exc.errno in (errno.ENOSPC, getattr(errno, "EDQUOT", -1)):
        return True
    text = str(exc).lower()
    return any(t in text for t in ("no space left", "disk quota exceeded", "free disk space available"))


def _device_full(folder: Path) -> bool:
    """True when the file system of ``folder`` has (almost) no free space for this user.

    Libraries do not always say "no space" when a write fails on a full disk (libtiff
    reports an I/O error writing tag data), so a failure is also judged by the disk.
    """
    try:
        st = os.statvfs(folder)
    except (OSError, AttributeError):
        return False
    return st.f_bavail * st.f_frsize < 1 << 20


def no_space_error(where: Path, out: Path, had_old: bool) -> InputError:
    kept = (f"{out} still holds the earlier outputs, unchanged" if had_old
            else f"nothing was written to {out}")
    return InputError(f"no space left on the device of {where} while writing the outputs; {kept}; "
                      "free some space or give another --out.")


def _name_max(folder: Path) -> int:
    try:
        return os.pathconf(folder, "PC_NAME_MAX")
    except (OSError, ValueError, AttributeError):
        return 255


def _path_max(folder: Path) -> int:
    try:
        return os.pathconf(folder, "PC_PATH_MAX")
    except (OSError, ValueError, AttributeError):
        return 4096


# ----------------------------------------------------------------------------
# renameat2(RENAME_EXCHANGE): swap two folders in one step (Linux 3.15+)
# ----------------------------------------------------------------------------

_RENAME_EXCHANGE = 2
_AT_FDCWD = -100
_renameat2 = None


def _exchange(a: Path, b: Path) -> bool:
    """Swap paths ``a`` and ``b`` atomically; False when the system cannot."""
    global _renameat2
    if _renameat2 is None:
        try:
            libc = ctypes.CDLL(None, use_errno=True)
            fn = libc.renameat2
            fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
            fn.restype = ctypes.c_int
            _renameat2 = fn
        except (OSError, AttributeError):
            _renameat2 = False
    if not _renameat2:
        return False
    rc = _renameat2(_AT_FDCWD, os.fsencode(a), _AT_FDCWD, os.fsencode(b), _RENAME_EXCHANGE)
    if rc == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.EINVAL, errno.ENOSYS, errno.ENOTSUP, errno.EOPNOTSUPP):
        return False
    raise OSError(err, os.strerror(err), str(b))


@contextlib.contextmanager
def signals_held() -> Iterator[None]:
    """Hold SIGINT, SIGTERM and SIGHUP back inside the block; they are acted on after it.

    The Python-level handlers are replaced by ones that only note the signal (a signal
    may be delivered to any thread, e.g. a numba worker, so a thread's signal mask alone
    cannot hold it back); on leaving the block the first noted signal is handed to the
    handler that was there before (raising KeyboardInterrupt, for example).
    """
    import threading

    if threading.current_thread() is not threading.main_thread():
        yield                                   # Python runs signal handlers in the main thread only
        return
    noted: list[int] = []
    previous = {}
    for s in SIGNALS:
        handler = signal.getsignal(s)
        if handler is not signal.SIG_IGN and handler is not None:
            previous[s] = signal.signal(s, lambda signum, frame: noted.append(signum))
    try:
        yield
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)
        if noted:
            handler = previous.get(noted[0])
            if callable(handler):
                handler(noted[0], None)
            elif handler == signal.SIG_DFL:
                os.kill(os.getpid(), noted[0])


# ----------------------------------------------------------------------------
# the manifest
# ----------------------------------------------------------------------------

def read_manifest(folder: Path) -> dict | None:
    """The manifest of an output folder, or None when there is none (or it is unreadable).

    Format (JSON): ``{"format": 1, "firnline_version", "command", "created_utc",
    "files": {name: {"size": bytes, "mtime_ns": int}}, "kept": [names]}``; ``files`` are
    the files the command wrote, ``kept`` the entries it found and left in place.
    """
    path = Path(folder) / MANIFEST
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError, UnicodeDecodeError):
        return None
    if not isinstance(data, dict) or not isinstance(data.get("files"), dict):
        return None
    return data


def _file_record(path: Path) -> dict:
    st = path.stat()
    return {"size": st.st_size, "mtime_ns": st.st_mtime_ns}


def _is_output_folder(path: Path) -> bool:
    return path.is_dir() and not path.is_symlink() and read_manifest(path) is not None


# ----------------------------------------------------------------------------
# locks
# ----------------------------------------------------------------------------

def lock_path(folder: Path) -> Path:
    return folder.parent / f".{folder.name}{WORK_TAG}lock"


def _lock_holder(path: Path) -> dict | None:
    """The live holder of a lock file, or None when the lock is absent or stale."""
    try:
        text = path.read_text(encoding="utf-8")
        st = path.stat()
    except FileNotFoundError:
        return None
    except OSError:
        return {"pid": "?", "host": "?"}
    try:
        info = json.loads(text)
        pid = int(info["pid"])
    except (ValueError, KeyError, TypeError):
        # being written this very moment, or garbage: young = live, old = stale
        age = dt.datetime.now().timestamp() - st.st_mtime
        return {"pid": "?", "host": "?"} if age < 10 else None
    if info.get("host") not in (None, socket.gethostname()):
        return info                        # another machine: we cannot tell; assume live
    if not pid_alive(pid):
        return None
    started = info.get("started")
    if started and _start_time(pid) not in (None, started):
        return None                        # the pid was reused by another process
    return info


def _holder_text(info: dict) -> str:
    host = info.get("host")
    return f"process {info.get('pid')}" + (f" on {host}" if host and host != socket.gethostname() else "")


# ----------------------------------------------------------------------------
# the output folder
# ----------------------------------------------------------------------------

class OutputFolder:
    """An output folder claimed by one command (see the module docstring).

    Parameters
    ----------
    path : path-like
        The output folder (``--out`` or ``[output] dir``).
    command : str
        The command writing into it ("run", "terrain", ...), recorded in the manifest.
    inputs : iterable of path-like
        Every input file of the run; none may lie inside the folder.
    force : bool
        Write even when the folder holds files no firnline run wrote (they are kept).
    cache_dir : path-like, optional
        The radiation cache folder: checked (must be a folder or creatable, not inside
        the output folder); its stale ``.tmp`` files are removed on :meth:`acquire`.
    """

    def __init__(self, path, command: str, inputs: Iterable = (), force: bool = False, cache_dir=None):
        given = Path(os.path.expanduser(os.fspath(path)))
        self.given = given
        self.path = Path(os.path.abspath(given))
        self.command = command
        self.inputs = [Path(os.path.abspath(os.path.expanduser(os.fspath(p)))) for p in inputs if p]
        self.force = force
        self.cache_dir = Path(os.path.abspath(os.fspath(cache_dir))) if cache_dir else None
        self.lock: Path | None = None
        self.kept: list[str] = []
        self.replaced: list[str] = []
        self.earlier: dict | None = None

    # -- checks ---------------------------------------------------------------

    def check(self) -> None:
        """Every check that needs no writing; raises InputError naming the problem."""
        p = self.path
        if os.path.islink(p):
            target = Path(os.path.realpath(p))
            if not target.exists():
                raise InputError(f"The output folder {self.given} is a link to {target}, which does not "
                                 "exist; give an existing folder or a new path.")
            self.path = p = target
        self._check_names(p)
        self._check_ancestors(p)
        if p.exists():
            if not p.is_dir():
                raise InputError(f"The output folder {self.given} is a file; give the path of a folder "
                                 "(new or holding only firnline outputs) with --out.")
            if os.path.ismount(p):
                raise InputError(f"The output folder {self.given} is a mount point; firnline replaces the "
                                 "folder as a whole when a run completes, so give a folder inside it.")
            if not self._writable(p):
                raise InputError(f"The output folder {self.given} is read-only; make it writable or give "
                                 "another --out.")
        self._check_inputs(p)
        self._check_cache(p)
        self._check_locks(p)
        if p.exists():
            self._check_contents(p)

    def _check_names(self, p: Path) -> None:
        parts = p.parts[1:]
        existing = p.parent
        while existing != existing.parent:
            try:
                if existing.exists():
                    break
            except OSError:
                pass
            existing = existing.parent
        limit = _name_max(existing)
        text = str(p)
        if any(ord(ch) < 32 or ord(ch) == 127 for ch in text):
            raise InputError(f"The output folder {text!r} has a control character (such as a line break) in its "
                             "name, which GIS programs and GDAL's drivers cannot handle; choose a plain name.")
        for part in parts:
            if len(os.fsencode(part)) > limit:
                raise InputError(f"The output folder {self.given}: the name \"{part[:40]}...\" is "
                                 f"{len(os.fsencode(part))} bytes long, more than the {limit} the file "
                                 "system allows; choose a shorter name.")
        if len(os.fsencode(p.name)) + LONGEST_SUFFIX > limit:
            raise InputError(f"The output folder {self.given}: the name \"{p.name[:40]}...\" is too long "
                             f"for firnline's work folders beside it (at most {limit - LONGEST_SUFFIX} "
                             "bytes); choose a shorter name.")
        if len(os.fsencode(str(p))) + LONGEST_SUFFIX + 64 > _path_max(existing):
            raise InputError(f"The output folder path {str(self.given)[:60]}... is longer than the file "
                             "system allows; choose a shorter path.")

    def _check_ancestors(self, p: Path) -> None:
        for anc in reversed(p.parents):
            if anc.exists() and not anc.is_dir():
                raise InputError(f"The output folder {self.given} lies under {anc}, which is a file, not "
                                 "a folder; give another --out.")
            if not anc.exists():
                break
        parent = p.parent
        nearest = parent
        while not nearest.exists():
            nearest = nearest.parent
        if not self._writable(nearest):
            raise InputError(f"Cannot create or replace the output folder {self.given}: the folder "
                             f"{nearest} is read-only for this user (firnline writes the new set beside "
                             "the output folder and swaps it in); make it writable or give another --out.")

    @staticmethod
    def _writable(folder: Path) -> bool:
        if not os.access(folder, os.W_OK | os.X_OK):
            return False
        try:
            st = folder.stat()
        except OSError:
            return False
        if hasattr(os, "geteuid") and os.geteuid() == 0:
            # root passes os.access; respect a folder made read-only on purpose
            return bool(st.st_mode & (stat.S_IWUSR | stat.S_IWGRP | stat.S_IWOTH))
        return True

    def _check_inputs(self, p: Path) -> None:
        real = Path(os.path.realpath(p))
        for inp in self.inputs:
            rin = Path(os.path.realpath(inp))
            for folder in {p, real}:
                if rin == folder or folder in rin.parents:
                    raise InputError(f"The output folder {self.given} holds {inp.name} ({inp}), an input of "
                                     "this run; firnline never writes over or moves its inputs (not even "
                                     "with --force), so give another --out.")

    def _check_cache(self, p: Path) -> None:
        c = self.cache_dir
        if c is None:
            return
        if c == p or p in c.parents:
            raise InputError(f"[radiation] cache_dir {c} lies inside the output folder {self.given}; put the "
                             "cache elsewhere (the output folder is replaced as a whole by each run).")
        if c.exists() and not c.is_dir():
            raise InputError(f"[radiation] cache_dir {c} is a file, not a folder; give a folder path.")
        for anc in c.parents:
            if anc.exists():
                if not anc.is_dir():
                    raise InputError(f"[radiation] cache_dir {c} lies under {anc}, which is a file; give "
                                     "another folder.")
                break

    def _check_locks(self, p: Path) -> None:
        holder = None if self.lock is not None else _lock_holder(lock_path(p))
        if holder:
            raise InputError(f"Another firnline run ({_holder_text(holder)}) is writing into {self.given}; "
                             "wait until it ends or give another --out.")
        for anc in p.parents:
            if anc == anc.parent:
                break
            holder = _lock_holder(lock_path(anc))
            if holder:
                raise InputError(f"Another firnline run ({_holder_text(holder)}) is writing into {anc}, "
                                 f"which holds {self.given}; wait until it ends or give another --out.")
        if p.is_dir():
            for entry in p.iterdir():
                if entry.name.endswith(f"{WORK_TAG}lock") and entry.name.startswith("."):
                    holder = _lock_holder(entry)
                    if holder:
                        inner = entry.name[1:-len(f"{WORK_TAG}lock")]
                        raise InputError(f"Another firnline run ({_holder_text(holder)}) is writing into "
                                         f"{p / inner}, inside {self.given}; wait until it ends.")

    def _classify(self, p: Path):
        """(ours, kept_nested, clutter, foreign, changed) entry names of folder ``p``."""
        man = read_manifest(p)
        self.earlier = man
        listed = dict(man["files"]) if man else {}
        ours, nested, clutter, foreign, changed = [], [], [], [], []
        for entry in sorted(p.iterdir(), key=lambda e: e.name):
            name = entry.name
            if name == MANIFEST:
                continue
            if name in listed and entry.is_file() and not entry.is_symlink():
                rec = _file_record(entry)
                if rec == {k: listed[name].get(k) for k in rec}:
                    ours.append(name)
                else:
                    changed.append(name)
            elif name.endswith(DERIVED_SUFFIXES) and any(
                    name == f + s for f in listed for s in DERIVED_SUFFIXES):
                ours.append(name)            # GDAL statistics/overviews of one of our rasters
            elif name in CLUTTER:
                clutter.append(name)
            elif _is_output_folder(entry):
                nested.append(name)
            elif name.startswith(".") and WORK_TAG in name and (p / name.split(WORK_TAG)[0][1:]).exists():
                ours.append(name)            # stale work entry of a nested folder: dropped
            else:
                foreign.append(name)
        return ours, nested, clutter, foreign, changed

    def _check_contents(self, p: Path) -> None:
        ours, nested, clutter, foreign, changed = self._classify(p)
        if (foreign or changed) and not self.force:
            if changed:
                what = (f"{changed[0]}, which was changed after firnline wrote it"
                        + (f" (and {len(changed) - 1} more)" if len(changed) > 1 else ""))
            else:
                what = (f"{foreign[0]}" + (f" and {len(foreign) - 1} more" if len(foreign) > 1 else "")
                        + ", which no firnline run wrote")
            raise InputError(f"The output folder {self.given} holds {what}; give an empty or new folder with "
                             "--out, or add --force to write beside them (they are kept; files of the same "
                             "name as an output are replaced).")
        self.kept = nested + clutter + (foreign + changed if self.force else [])
        self.replaced = ours

    # -- lock and leftovers -----------------------------------------------------

    def acquire(self) -> "OutputFolder":
        """Check, take the lock, clear leftovers of killed runs, check again under the lock."""
        self.check()
        parent = self.path.parent
        try:
            parent.mkdir(parents=True, exist_ok=True)
        except OSError as e:
            raise InputError(f"Cannot create the output folder {self.given} ({e.strerror}); give another "
                             "--out.") from None
        lock = lock_path(self.path)
        info = json.dumps({"pid": os.getpid(), "host": socket.gethostname(),
                           "started": _start_time(os.getpid()), "command": self.command,
                           "since_utc": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")})
        for _ in range(3):
            try:
                fd = os.open(lock, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
            except FileExistsError:
                holder = _lock_holder(lock)
                if holder:
                    raise InputError(f"Another firnline run ({_holder_text(holder)}) is writing into "
                                     f"{self.given}; wait until it ends or give another --out.") from None
                # stale: move it aside under a unique name (only one taker wins), then retry
                aside = lock.with_name(f"{lock.name}-stale-{os.getpid()}-{secrets.token_hex(4)}")
                with contextlib.suppress(FileNotFoundError):
                    os.rename(lock, aside)
                    aside.unlink()
                continue
            except OSError as e:
                if _is_no_space(e):
                    raise no_space_error(parent, self.path, self.path.exists()) from None
                raise InputError(f"Cannot write beside the output folder {self.given} in {parent} "
                                 f"({e.strerror}); make it writable or give another --out.") from None
            try:
                with os.fdopen(fd, "w", encoding="utf-8") as f:
                    f.write(info)
            except OSError as e:
                with contextlib.suppress(OSError):
                    lock.unlink()
                if _is_no_space(e):
                    raise no_space_error(parent, self.path, self.path.exists()) from None
                raise
            self.lock = lock
            break
        else:
            raise InputError(f"Could not take the lock {lock} of the output folder; try again.")
        try:
            self._clear_leftovers()
            self.check()
            _ACTIVE[str(self.path)] = self
            STATE.update(folder=self.path, had_old=self.path.exists(), committed=False)
            pause_point("locked")
        except BaseException:
            self.release()
            raise
        return self

    def _clear_leftovers(self) -> None:
        p = self.path
        prefix = f".{p.name}{WORK_TAG}"
        work = [e for e in p.parent.iterdir()
                if e.name.startswith(prefix) and (f"{WORK_TAG}staging-" in e.name or f"{WORK_TAG}old-" in e.name)]
        olds = [e for e in work if f"{WORK_TAG}old-" in e.name]
        if not p.exists() and olds:
            # killed between the two renames of a swap: the earlier set comes back
            os.rename(olds[0], p)
            work.remove(olds[0])
        # the spilled maps of a run that was killed (firnline.yearmaps); a live run's stay
        from .yearmaps import WORK_PART, stale
        work += [e for e in p.parent.iterdir()
                 if e.name.startswith(prefix) and f"{WORK_TAG}{WORK_PART}" in e.name and stale(e.name)]
        for e in work:
            shutil.rmtree(e, ignore_errors=True)
        if self.cache_dir is not None:
            clear_cache_tmp(self.cache_dir)

    def release(self) -> None:
        _ACTIVE.pop(str(self.path), None)
        if self.lock is not None:
            with contextlib.suppress(OSError):
                self.lock.unlink()
            self.lock = None

    def __enter__(self) -> "OutputFolder":
        if self.lock is None:
            self.acquire()
        return self

    def __exit__(self, *exc) -> None:
        self.release()

    # -- staging and commit -------------------------------------------------------

    def stage(self) -> "Staging":
        return Staging(self)


class Staging:
    """The new set, written into a folder beside the output folder; see :meth:`commit`."""

    def __init__(self, owner: OutputFolder):
        self.owner = owner
        self.final_dir = owner.path
        name = f".{owner.path.name}{WORK_TAG}staging-{os.getpid()}-{secrets.token_hex(6)}"
        self.dir = owner.path.parent / name
        try:
            os.mkdir(self.dir)
        except OSError as e:
            if _is_no_space(e):
                raise no_space_error(owner.path.parent, owner.path, owner.path.exists()) from None
            raise
        if owner.path.is_dir():
            with contextlib.suppress(OSError):
                os.chmod(self.dir, stat.S_IMODE(owner.path.stat().st_mode))
        self.names: list[str] = []

    def path(self, name: str) -> Path:
        """Where to write ``name`` now (inside the staging folder)."""
        if name not in self.names:
            self.names.append(name)
            if len(self.names) == 2:
                pause_point("writing")
        return self.dir / name

    def commit(self) -> list[Path]:
        """Carry the kept entries over, write the manifest, swap the new set in."""
        owner, out = self.owner, self.owner.path
        written = [n for n in self.names if (self.dir / n).exists()]
        for name in owner.kept:
            if name not in written:
                _link_tree(out / name, self.dir / name)
        manifest = {"format": MANIFEST_FORMAT, "firnline_version": __version__, "command": owner.command,
                    "created_utc": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
                    "files": {n: _file_record(self.dir / n) for n in written},
                    "kept": [n for n in owner.kept if n not in written]}
        tmp = self.dir / (MANIFEST + ".tmp")
        tmp.write_text(json.dumps(manifest, indent=1) + "\n", encoding="utf-8")
        os.replace(tmp, self.dir / MANIFEST)
        pause_point("staged")
        old_dir = out.parent / f".{out.name}{WORK_TAG}old-{os.getpid()}-{secrets.token_hex(6)}"
        leftover = None
        try:
            with signals_held():   # a signal arriving now is acted on when the swap is done
                pause_point("swapping")
                if not out.exists():
                    os.rename(self.dir, out)
                elif _exchange(self.dir, out):
                    leftover = self.dir           # now holds the earlier set
                else:
                    os.rename(out, old_dir)       # a kill between these two: the next run repairs
                    leftover = old_dir
                    pause_point("between_renames")
                    os.rename(self.dir, out)
                STATE.update(committed=True)
            pause_point("swapped")
        finally:
            if leftover is not None and STATE.get("committed"):
                shutil.rmtree(leftover, ignore_errors=True)
        return [out / n for n in written]

    def discard(self) -> None:
        shutil.rmtree(self.dir, ignore_errors=True)


def _link_tree(src: Path, dst: Path) -> None:
    """Hard-link (or copy) ``src`` to ``dst``; folders are recreated and their files linked."""
    if src.is_symlink():
        os.symlink(os.readlink(src), dst)
    elif src.is_dir():
        os.mkdir(dst)
        shutil.copystat(src, dst)
        for entry in src.iterdir():
            _link_tree(entry, dst / entry.name)
    else:
        try:
            os.link(src, dst)
        except OSError:
            shutil.copy2(src, dst)


def clear_cache_tmp(cache_dir: Path) -> int:
    """Remove ``.tmp`` files of the cache written by processes that no longer exist."""
    n = 0
    try:
        entries = list(Path(cache_dir).iterdir())
    except OSError:
        return 0
    for e in entries:
        if not (e.name.startswith(".") and e.name.endswith(".tmp")):
            continue
        pid = _tmp_pid(e.name)
        if pid is not None and not pid_alive(pid):
            with contextlib.suppress(OSError):
                e.unlink()
                n += 1
    return n


def _tmp_pid(name: str) -> int | None:
    """The writer's pid embedded in a cache temporary name (``.<stem>.pid<N>.<random>.tmp``)."""
    for part in name.split("."):
        if part.startswith("pid") and part[3:].isdigit():
            return int(part[3:])
    return None


# ----------------------------------------------------------------------------
# entry points used by the writers and the commands
# ----------------------------------------------------------------------------

def claim(path, command: str, inputs: Iterable = (), force: bool = False, cache_dir=None) -> OutputFolder:
    """Check and lock an output folder before any computation (use as a context manager)."""
    return OutputFolder(path, command, inputs, force, cache_dir).acquire()


@contextlib.contextmanager
def library_messages_held() -> Iterator[dict]:
    """Collect what C libraries (GDAL, libtiff, HDF5) print on stderr inside the block.

    On leaving, the collected text is printed after all, unless the block set
    ``state["drop"]`` (a full disk: libtiff then prints one line per failed write, and
    the command says it in one sentence instead).
    """
    state = {"drop": False}
    try:
        sys.stderr.flush()
        saved = os.dup(2)
        tmp = tempfile.TemporaryFile()
    except (OSError, ValueError, AttributeError):
        yield state
        return
    os.dup2(tmp.fileno(), 2)
    try:
        yield state
    finally:
        with contextlib.suppress(OSError, ValueError, AttributeError):
            sys.stderr.flush()
        os.dup2(saved, 2)
        os.close(saved)
        if not state["drop"]:
            with contextlib.suppress(OSError):
                tmp.seek(0)
                text = tmp.read()
                if text:
                    os.write(2, text)
        tmp.close()


@contextlib.contextmanager
def staged(final_dir) -> Iterator[Staging]:
    """Stage files; on success they replace the folder's earlier firnline set in one swap.

    Uses the folder claimed by the running command (:func:`claim`); without one (the
    Python API) the folder is claimed here, with the same checks.
    """
    path = Path(os.path.abspath(os.path.expanduser(os.fspath(final_dir))))
    owner = _ACTIVE.get(str(path)) or _ACTIVE.get(str(Path(os.path.realpath(path))))
    implicit = owner is None
    if implicit:
        owner = claim(path, "write")
    try:
        st = owner.stage()
        try:
            with library_messages_held() as messages:
                try:
                    yield st
                except Exception as exc:
                    messages["drop"] = full = _is_no_space(exc) or _device_full(st.dir)
                    if full and not isinstance(exc, InputError):
                        raise no_space_error(path.parent, path, bool(STATE.get("had_old"))) from None
                    raise
            st.commit()
        except BaseException as exc:
            full = (isinstance(exc, Exception) and not isinstance(exc, InputError)
                    and (_is_no_space(exc) or _device_full(path.parent)))
            if not STATE.get("committed"):
                st.discard()
            if full:
                raise no_space_error(path.parent, path, bool(STATE.get("had_old"))) from None
            raise
    finally:
        if implicit:
            owner.release()


def interruption_message() -> str:
    """One truthful sentence on what an interrupted command left in its output folder."""
    folder = STATE.get("folder")
    if folder is None:
        return "interrupted before anything was written."
    if STATE.get("committed"):
        return f"interrupted after the new outputs were complete: {folder} holds the new set."
    if STATE.get("had_old"):
        return f"interrupted; {folder} still holds the earlier outputs, unchanged (none of the new set was kept)."
    return f"interrupted; no output was written to {folder}."


# ----------------------------------------------------------------------------
# files written beside the user's own (the demo inputs): per-file replace
# ----------------------------------------------------------------------------

DEMO_STAGING = ".firnline-demo-staging-"


class FileStaging:
    """Stage files inside ``folder`` and move them in on commit, beside whatever else it holds.

    Used where the folder is the user's, not firnline's (``firnline demo DIR``): a file of
    the same name as one staged is replaced only when its bytes are those firnline would
    write now, i.e. it is firnline's own earlier file; anything else refuses the commit
    before any file is moved. The moves happen with signals held back.
    """

    def __init__(self, folder, what: str = "demo"):
        self.final_dir = Path(folder)
        self.what = what
        if self.final_dir.exists() and not self.final_dir.is_dir():
            raise InputError(f"The {what} folder {folder} is a file; give the path of a folder.")
        try:
            self.final_dir.mkdir(parents=True, exist_ok=True)
        except OSError as e:
            raise InputError(f"Cannot create the {what} folder {folder} ({e.strerror}); give another "
                             "path.") from None
        for e in self.final_dir.iterdir():                   # leftovers of killed runs
            if e.name.startswith(DEMO_STAGING) and e.is_dir():
                pid = e.name[len(DEMO_STAGING):].split("-")[0]
                if pid.isdigit() and not pid_alive(int(pid)):
                    shutil.rmtree(e, ignore_errors=True)
        try:
            self.dir = self.final_dir / f"{DEMO_STAGING}{os.getpid()}-{secrets.token_hex(6)}"
            os.mkdir(self.dir)
        except OSError as e:
            raise InputError(f"Cannot write into the {what} folder {folder} ({e.strerror}); make it "
                             "writable or give another path.") from None
        self.names: list[str] = []

    def path(self, name: str) -> Path:
        if name not in self.names:
            self.names.append(name)
        return self.dir / name

    def clashes(self) -> list[str]:
        """Names staged whose file in the folder is not byte-identical to the staged one."""
        out = []
        for n in self.names:
            dst = self.final_dir / n
            if os.path.lexists(dst):
                if not dst.is_file() or dst.is_symlink() or not _same_bytes(dst, self.dir / n):
                    out.append(n)
        return out

    def commit(self) -> list[Path]:
        bad = self.clashes()
        if bad:
            raise InputError(f"The {self.what} folder {self.final_dir} already holds {bad[0]}"
                             + (f" and {len(bad) - 1} more of the {self.what}'s file names" if len(bad) > 1 else "")
                             + f", which is not firnline's {self.what} file (it differs from what firnline "
                             "writes); move it away or give another folder.")
        done = []
        with signals_held():
            for n in self.names:
                os.replace(self.dir / n, self.final_dir / n)
                done.append(self.final_dir / n)
        shutil.rmtree(self.dir, ignore_errors=True)
        return done

    def discard(self) -> None:
        shutil.rmtree(self.dir, ignore_errors=True)


def _same_bytes(a: Path, b: Path) -> bool:
    if a.stat().st_size != b.stat().st_size:
        return False
    with open(a, "rb") as fa, open(b, "rb") as fb:
        while True:
            x, y = fa.read(1 << 20), fb.read(1 << 20)
            if x != y:
                return False
            if not x:
                return True


@contextlib.contextmanager
def staged_beside(folder, what: str = "demo") -> Iterator[FileStaging]:
    """Context manager around :class:`FileStaging`: commit on success, discard otherwise."""
    st = FileStaging(folder, what)
    try:
        yield st
        st.commit()
    except BaseException as exc:
        st.discard()
        if _is_no_space(exc) and not isinstance(exc, InputError):
            raise InputError(f"no space left on the device of {folder} while writing the {what}; nothing "
                             "was changed there; free some space or give another folder.") from None
        raise
