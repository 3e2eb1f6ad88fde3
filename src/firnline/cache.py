"""On-disk cache of the radiation climatology and the horizon angles.

Work that depends only on the DEM and the radiation settings is done once and
reused by every run, scenario and calibration. Entries are ``.npz`` files in a
cache folder, named by a key that hashes everything that changes the result:
pass the DEM content checksum and every setting (transmissivity, time step,
sectors, distance, ...); the algorithm versions of :mod:`firnline.horizon` and
:mod:`firnline.radiation` are always mixed in. Files are written to a
temporary name in the same folder and renamed when complete, so a reader sees
either a whole entry or none; an unreadable or mismatching entry counts as a miss.
"""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
import zipfile
from pathlib import Path

import numpy as np

from . import horizon, radiation
from .radiation import RadiationTable

#: Layout of the files written here; part of every key (2: with a SHA-256 per array).
FORMAT_VERSION = 2

#: Why the last lookup of a cache file was a miss although the file exists ({path: reason}).
MISSES: dict[str, str] = {}


def _canonical(value):
    """A JSON-able, type-stable form of a key part (floats by repr, arrays by content hash)."""
    if isinstance(value, np.ndarray):
        digest = hashlib.sha256(np.ascontiguousarray(value).tobytes()).hexdigest()
        return {"array": digest, "dtype": value.dtype.str, "shape": list(value.shape)}
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return repr(float(value))
    if isinstance(value, (str, Path)):
        return str(value)
    if value is None:
        return None
    if isinstance(value, dict):
        return {str(k): _canonical(v) for k, v in sorted(value.items())}
    if isinstance(value, (list, tuple)):
        return [_canonical(v) for v in value]
    raise TypeError(f"cache key part of type {type(value).__name__} is not supported")


def cache_key(**parts) -> str:
    """Key of a cache entry from everything that determines it.

    Parameters
    ----------
    **parts
        Named parts, e.g. ``dem_sha256=..., transmissivity=0.75,
        time_step_minutes=15, horizon_sectors=72, horizon_distance_m=20000.0``.
        Values may be str, int, float, bool, None, numpy arrays (hashed by
        content, dtype and shape), or lists/tuples/dicts of these. Order of the
        parts does not matter; ``15`` and ``15.0`` are different parts.

    Returns
    -------
    str
        40 hexadecimal characters (SHA-256 prefix) of the parts together with
        the horizon and radiation algorithm versions, the table's day-node
        spacing and storage scale, and the file format.
    """
    payload = dict(parts)
    payload["_versions"] = [horizon.ALGORITHM_VERSION, radiation.ALGORITHM_VERSION, FORMAT_VERSION,
                            radiation.NODE_SPACING_DAYS, repr(radiation.STORAGE_SCALE_W_M2)]
    text = json.dumps(_canonical(payload), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:40]


def _path(cache_dir, kind: str, key: str) -> Path:
    if not key or any(ch not in "0123456789abcdef" for ch in key):
        raise ValueError("cache key must be a hexadecimal string from cache_key()")
    return Path(cache_dir) / f"{kind}-{key}.npz"


def _digest(a: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(a).tobytes()).hexdigest()


def _shared_mode(base: int) -> int:
    """``base`` without the bits the umask removes, but always readable (and, for folders,
    enterable) by the group: a shared cache on a team server is normal."""
    mask = os.umask(0)
    os.umask(mask)
    group = 0o050 if base & 0o100 else 0o040
    return (base & ~mask) | group | 0o600


def _write_npz(path: Path, arrays: dict) -> None:
    if not path.parent.is_dir():
        path.parent.mkdir(parents=True, exist_ok=True)
        os.chmod(path.parent, _shared_mode(0o775))
    arrays = dict(arrays)
    for name in [n for n in arrays if n not in ("key", "format_version")]:
        arrays[f"sha256_{name}"] = np.array(_digest(np.asarray(arrays[name])))
    # the writer's pid in the name lets the next run remove it if this process is killed
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.pid{os.getpid()}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            np.savez(fh, **arrays)
        os.chmod(tmp, _shared_mode(0o664))
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.remove(tmp)
        raise


def _read_npz(path: Path, key: str, expect: dict):
    """Arrays of an entry, checked, or None (a miss) when missing, unreadable, of another key,
    of another shape or dtype than ``expect`` gives, or when an array's SHA-256 differs from
    the one stored with it; the reason of a miss of an existing file goes into :data:`MISSES`.

    ``expect`` maps each array name to ``(dtype or None, check)`` where ``check(array)`` is
    None when the array fits, else a short reason.
    """
    MISSES.pop(str(path), None)
    if not path.is_file():
        return None

    def miss(reason: str):
        MISSES[str(path)] = reason
        return None
    try:
        with np.load(path, allow_pickle=False) as data:
            if str(data["key"]) != key or int(data["format_version"]) != FORMAT_VERSION:
                return miss("it was written for other settings or by another version")
            out = {}
            for name, (dtype, check) in expect.items():
                a = data[name]
                if dtype is not None and a.dtype != np.dtype(dtype):
                    return miss(f"its {name} is {a.dtype}, not {np.dtype(dtype)}")
                reason = check(a) if check else None
                if reason:
                    return miss(reason)
                if str(data[f"sha256_{name}"]) != _digest(a):
                    return miss(f"the checksum of its {name} does not match (the file is damaged)")
                out[name] = a
            return out
    except (OSError, ValueError, KeyError, EOFError, zipfile.BadZipFile) as e:
        return miss(f"it cannot be read ({type(e).__name__})")


def save_table(cache_dir, key: str, table: RadiationTable) -> Path:
    """Write a radiation table to the cache.

    Parameters
    ----------
    cache_dir : str or path-like
        Cache folder (created if missing).
    key : str
        Key from :func:`cache_key`.
    table : RadiationTable
        The table to store.

    Returns
    -------
    pathlib.Path
        The file written (``radiation-<key>.npz``).
    """
    path = _path(cache_dir, "radiation", key)
    _write_npz(path, {
        "key": np.array(key),
        "format_version": np.array(FORMAT_VERSION),
        "doy_nodes": np.asarray(table.doy_nodes),
        "values": np.asarray(table.values),
        "scale_w_m2": np.array(float(table.scale_w_m2)),
    })
    return path


def load_table(cache_dir, key: str, n_cells: int | None = None) -> RadiationTable | None:
    """Radiation table stored under ``key``, or None if there is no usable entry.

    Parameters
    ----------
    cache_dir : str or path-like
        Cache folder.
    key : str
        Key from :func:`cache_key`.
    n_cells : int, optional
        The number of valid cells the table must have (its second axis).

    Returns
    -------
    RadiationTable or None
        None also when the stored table is not 2-D, has another number of cells, rows
        other than its day nodes, or a content checksum that does not match.
    """
    def nodes_ok(a):
        return None if a.ndim == 1 and a.size > 0 else "its day nodes are not a list of days"

    def values_ok(a):
        if a.dtype not in (np.dtype("uint16"), np.dtype("float32")):
            return f"its table is {a.dtype}, not uint16 or float32"
        if a.ndim != 2:
            return f"its table has {a.ndim} dimensions, not 2"
        if n_cells is not None and a.shape[1] != n_cells:
            return f"its table covers {a.shape[1]} cells, not the DEM's {n_cells}"
        return None
    data = _read_npz(_path(cache_dir, "radiation", key), key,
                     {"doy_nodes": (None, nodes_ok), "values": (None, values_ok),
                      "scale_w_m2": (None, lambda a: None if a.ndim == 0 else "its scale is not a number")})
    if data is not None and data["values"].shape[0] != data["doy_nodes"].shape[0]:
        MISSES[str(_path(cache_dir, "radiation", key))] = "its table rows do not match its day nodes"
        return None
    if data is None:
        return None
    return RadiationTable(doy_nodes=data["doy_nodes"], values=data["values"], scale_w_m2=float(data["scale_w_m2"]))


def save_horizons(cache_dir, key: str, horizon_rad: np.ndarray) -> Path:
    """Write horizon angles (n_sectors, ny, nx), radians, to the cache as ``horizon-<key>.npz``."""
    path = _path(cache_dir, "horizon", key)
    _write_npz(path, {
        "key": np.array(key),
        "format_version": np.array(FORMAT_VERSION),
        "horizon_rad": np.asarray(horizon_rad, dtype=np.float32),
    })
    return path


def load_horizons(cache_dir, key: str, shape: tuple[int, int] | None = None,
                  n_sectors: int | None = None) -> np.ndarray | None:
    """Horizon angles stored under ``key`` (float32, radians), or None if there is no usable entry
    (also when they are not (n_sectors, ny, nx) of the given grid ``shape`` or their checksum differs)."""
    def ok(a):
        if a.ndim != 3:
            return f"its horizons have {a.ndim} dimensions, not 3"
        if shape is not None and tuple(a.shape[1:]) != tuple(shape):
            return f"its horizons are {a.shape[1]} x {a.shape[2]}, not the DEM's {shape[0]} x {shape[1]}"
        if n_sectors is not None and a.shape[0] != n_sectors:
            return f"it has {a.shape[0]} horizon sectors, not {n_sectors}"
        return None
    data = _read_npz(_path(cache_dir, "horizon", key), key, {"horizon_rad": ("float32", ok)})
    return None if data is None else data["horizon_rad"]


def horizon_path(cache_dir, key: str) -> Path:
    """The cache file of a horizon set (``horizon-<key>.npz``)."""
    return _path(cache_dir, "horizon", key)


def table_path(cache_dir, key: str) -> Path:
    """The cache file of a radiation table (``radiation-<key>.npz``)."""
    return _path(cache_dir, "radiation", key)
