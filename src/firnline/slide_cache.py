"""On-disk cache of the snow-redistribution routing (:mod:`firnline.snowslide`), with the terrain.

The routing depends only on the DEM (elevation, valid cells, cell size, slope) and on the
scheme's parameters; it is built once and reused by every run, scenario and calibration.
Entries live in the same cache folder as the radiation table (``[radiation] cache_dir``),
as ``routing-<key>.npz``, written through :mod:`firnline.cache` (temporary name, then
rename). The key hashes the DEM checksum, its shape and transform, the scheme and its
parameters and :data:`firnline.snowslide.ALGORITHM_VERSION`.

Before use an entry is checked: its key and format, the dtype and shape of every array
(against the number of valid cells the caller expects), the link arrays' consistency and a
SHA-256 of the array contents stored with them. Any mismatch or an unreadable file is a
cache miss (the routing is rebuilt and the entry rewritten), never an error.
"""

from __future__ import annotations

import hashlib
import time
import zipfile
from pathlib import Path

import numpy as np

from . import cache, snowslide
from .snowslide import Routing

#: Layout of the routing entries; part of every key.
ROUTING_FORMAT = 1

_ARRAYS = (("order", np.int32), ("recv_ptr", np.int32), ("recv_pos", np.int32),
           ("recv_weight", np.float32), ("holding_mm", np.float32))


def routing_key(dem_sha256: str, shape, transform, scheme: str, exponent: float,
                snow_density_kg_m3: float, min_slide_slope_deg: float) -> str:
    """Cache key of a routing (40 hexadecimal characters, see :func:`firnline.cache.cache_key`)."""
    return cache.cache_key(kind="snow-routing", dem_sha256=dem_sha256, shape=list(shape),
                           transform=list(transform)[:6], scheme=scheme, exponent=float(exponent),
                           snow_density_kg_m3=float(snow_density_kg_m3),
                           min_slide_slope_deg=float(min_slide_slope_deg),
                           algorithm=snowslide.ALGORITHM_VERSION, routing_format=ROUTING_FORMAT)


def _content_sha256(arrays: dict) -> str:
    h = hashlib.sha256()
    for name, dtype in _ARRAYS:
        a = np.ascontiguousarray(arrays[name])
        h.update(f"{name}:{a.dtype.str}:{a.shape}".encode())
        h.update(memoryview(a.reshape(-1)).cast("B"))        # the bytes without a copy
    return h.hexdigest()


def routing_path(cache_dir, key: str) -> Path:
    """The cache file of a routing (``routing-<key>.npz``)."""
    return cache._path(cache_dir, "routing", key)


def save_routing(cache_dir, key: str, routing: Routing) -> Path:
    """Write a routing to the cache; returns the file written."""
    arrays = {name: np.ascontiguousarray(getattr(routing, name), dtype=dtype) for name, dtype in _ARRAYS}
    path = routing_path(cache_dir, key)
    cache._write_npz(path, {
        "key": np.array(key), "format_version": np.array(cache.FORMAT_VERSION),
        "routing_format": np.array(ROUTING_FORMAT), "content_sha256": np.array(_content_sha256(arrays)),
        "scheme": np.array(routing.scheme), "exponent": np.array(routing.exponent),
        "snow_density_kg_m3": np.array(routing.snow_density_kg_m3),
        "min_slide_slope_deg": np.array(routing.min_slide_slope_deg), **arrays})
    return path


def load_routing(cache_dir, key: str, n_cells: int) -> Routing | None:
    """The routing stored under ``key`` for ``n_cells`` valid cells, or None if there is no usable entry.

    None (a miss) when the file is missing, unreadable, of another key or format, or when
    any array has the wrong dtype or shape, the links are inconsistent, or the content
    checksum does not match.
    """
    path = routing_path(cache_dir, key)
    if not path.is_file():
        return None
    try:
        with np.load(path, allow_pickle=False) as data:
            if (str(data["key"]) != key or int(data["format_version"]) != cache.FORMAT_VERSION
                    or int(data["routing_format"]) != ROUTING_FORMAT):
                return None
            arrays = {name: data[name] for name, _ in _ARRAYS}
            meta = {name: data[name][()] for name in ("content_sha256", "scheme", "exponent",
                                                      "snow_density_kg_m3", "min_slide_slope_deg")}
    except (OSError, ValueError, KeyError, EOFError, zipfile.BadZipFile):
        return None
    for name, dtype in _ARRAYS:
        if arrays[name].dtype != np.dtype(dtype) or arrays[name].ndim != 1:
            return None
    n = int(n_cells)
    ptr = arrays["recv_ptr"]
    if (arrays["order"].shape != (n,) or arrays["holding_mm"].shape != (n,) or ptr.shape != (n + 1,)
            or ptr[0] != 0 or np.any(np.diff(ptr) < 0)
            or arrays["recv_pos"].shape != (int(ptr[-1]),) or arrays["recv_weight"].shape != (int(ptr[-1]),)):
        return None
    if str(meta["content_sha256"]) != _content_sha256(arrays):
        return None
    return Routing(**arrays, scheme=str(meta["scheme"]), exponent=float(meta["exponent"]),
                   snow_density_kg_m3=float(meta["snow_density_kg_m3"]),
                   min_slide_slope_deg=float(meta["min_slide_slope_deg"]))


def cached_routing(cache_dir, dem_sha256: str, transform, elevation: np.ndarray, valid: np.ndarray,
                   cell_size_m, slope_deg: np.ndarray,
                   snow_density_kg_m3: float = snowslide.DEFAULT_SNOW_DENSITY_KG_M3,
                   min_slide_slope_deg: float = snowslide.DEFAULT_MIN_SLIDE_SLOPE_DEG,
                   scheme: str = "steepest", exponent: float = snowslide.DEFAULT_MFD_EXPONENT):
    """The routing of a DEM from the cache, or built (:func:`firnline.snowslide.build_routing`) and cached.

    Parameters
    ----------
    cache_dir : path-like
        Cache folder (``[radiation] cache_dir``).
    dem_sha256 : str
        Content checksum of the DEM (``Grid.checksum``).
    transform : affine transform of the grid (first six coefficients are keyed).
    elevation, valid, cell_size_m, slope_deg, snow_density_kg_m3, min_slide_slope_deg, scheme, exponent
        As for :func:`firnline.snowslide.build_routing`.

    Returns
    -------
    routing : Routing
    note : str
        One sentence for the console: built (and cached) or reused.
    """
    exponent = float(exponent) if scheme == "multiple" else 0.0
    key = routing_key(dem_sha256, np.shape(elevation), transform, scheme, exponent,
                      snow_density_kg_m3, min_slide_slope_deg)
    n_cells = int(np.count_nonzero(valid))
    routing = load_routing(cache_dir, key, n_cells)
    if routing is not None:
        return routing, f"reused the cached snow-redistribution routing ({routing_path(cache_dir, key)})."
    t0 = time.perf_counter()
    routing = snowslide.build_routing(elevation, valid, cell_size_m, slope_deg, snow_density_kg_m3,
                                      min_slide_slope_deg, scheme,
                                      exponent if scheme == "multiple" else snowslide.DEFAULT_MFD_EXPONENT)
    save_routing(cache_dir, key, routing)
    return routing, (f"built the snow-redistribution routing in {time.perf_counter() - t0:.1f} s "
                     f"and cached it in {cache_dir}.")
