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

#: Layout of the files written here; part of every key.
FORMAT_VERSION = 1


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


def _write_npz(path: Path, arrays: dict) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            np.savez(fh, **arrays)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.remove(tmp)
        raise


def _read_npz(path: Path, key: str, names: tuple[str, ...]):
    """Arrays ``names`` of an entry, or None when missing, unreadable or of another key."""
    if not path.is_file():
        return None
    try:
        with np.load(path, allow_pickle=False) as data:
            if str(data["key"]) != key or int(data["format_version"]) != FORMAT_VERSION:
                return None
            return {name: data[name] for name in names}
    except (OSError, ValueError, KeyError, EOFError, zipfile.BadZipFile):
        return None


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


def load_table(cache_dir, key: str) -> RadiationTable | None:
    """Radiation table stored under ``key``, or None if there is no usable entry.

    Parameters
    ----------
    cache_dir : str or path-like
        Cache folder.
    key : str
        Key from :func:`cache_key`.

    Returns
    -------
    RadiationTable or None
    """
    data = _read_npz(_path(cache_dir, "radiation", key), key, ("doy_nodes", "values", "scale_w_m2"))
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


def load_horizons(cache_dir, key: str) -> np.ndarray | None:
    """Horizon angles stored under ``key`` (float32, radians), or None if there is no usable entry."""
    data = _read_npz(_path(cache_dir, "horizon", key), key, ("horizon_rad",))
    return None if data is None else data["horizon_rad"]


def table_path(cache_dir, key: str) -> Path:
    """The cache file of a radiation table (``radiation-<key>.npz``)."""
    return _path(cache_dir, "radiation", key)
