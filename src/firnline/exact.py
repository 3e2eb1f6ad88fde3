"""Sums that do not depend on the order of their terms, so that partial sums merge exactly.

A float64 sum changes in its last bits with the order of its terms, so the partial sums of
the units of a tiled run, added up, would differ from the sum over the whole DEM. Here each
term is split exactly into integers: ``x = m 2**e`` (:func:`numpy.frexp`), its 53-bit
significand ``M = m 2**53`` cut into ``hi = M >> 26`` and ``lo = M & (2**26 - 1)``; per key
and exponent the ``hi`` and ``lo`` are summed as int64, exact up to 2**36 terms of one key
and exponent. Integer addition is associative, so partial sums merge exactly in any order
(:func:`merge`), and the float value of a key is made once from its merged integers in a
fixed order (ascending exponent, :func:`values`): a function of the exact sum only, the same
for any cut into units, any number of workers and any order of completion.

Keys are non-negative int64 labels chosen by the caller (for example a glacier's year,
quantity and elevation band packed into one integer).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

_SPLIT = 26
_LO_MASK = (1 << _SPLIT) - 1
_SIGNIFICAND_BITS = 53


@dataclass(frozen=True)
class Sums:
    """Exact sums per key: entries sorted by (key, exponent), ``sum = hi 2**(exp + 26) + lo 2**exp``.

    ``nonfinite`` holds the keys that had a NaN or infinite term (their value is NaN).
    """

    key: np.ndarray
    exp: np.ndarray
    hi: np.ndarray
    lo: np.ndarray
    nonfinite: np.ndarray

    @classmethod
    def empty(cls) -> "Sums":
        z = np.zeros(0, dtype=np.int64)
        return cls(z, z, z, z, z)

    @property
    def nbytes(self) -> int:
        return int(sum(a.nbytes for a in (self.key, self.exp, self.hi, self.lo, self.nonfinite)))


def _normal(key, exp, hi, lo, nonfinite) -> Sums:
    """Carry ``lo`` into ``hi`` and drop the zero entries (entries already unique and sorted)."""
    hi = hi + (lo >> _SPLIT)
    lo = lo & _LO_MASK
    keep = (hi != 0) | (lo != 0)
    return Sums(key[keep], exp[keep], hi[keep], lo[keep], np.unique(nonfinite))


def of(keys, values) -> Sums:
    """The exact sums of ``values`` per key (``keys`` and ``values`` of one shape, or a key per value).

    Parameters
    ----------
    keys : array of int, non-negative
    values : array of float (converted to float64)
    """
    v = np.asarray(values, dtype="float64").ravel()
    k = np.broadcast_to(np.asarray(keys, dtype=np.int64), np.shape(values)).ravel()
    finite = np.isfinite(v)
    nonfinite = np.unique(k[~finite])
    if not finite.all():
        k, v = k[finite], v[finite]
    m, e = np.frexp(v)
    sig = np.ldexp(m, _SIGNIFICAND_BITS).astype(np.int64)        # exact: |m| < 1
    nz = sig != 0
    if not nz.all():
        k, sig, e = k[nz], sig[nz], e[nz]
    if k.size == 0:
        return _with_nonfinite(Sums.empty(), nonfinite)
    e = e.astype(np.int64) - _SIGNIFICAND_BITS
    e0 = int(e.min())
    ne = int(e.max()) - e0 + 1
    k0 = int(k.min())
    span = int(k.max()) - k0 + 1
    if span * ne <= 4 * k.size + 4096:          # a dense table of (key, exponent) bins
        bins = (k - k0) * ne + (e - e0)
        hi = np.zeros(span * ne, dtype=np.int64)
        lo = np.zeros(span * ne, dtype=np.int64)
        np.add.at(hi, bins, sig >> _SPLIT)
        np.add.at(lo, bins, sig & _LO_MASK)
        used = np.flatnonzero((hi != 0) | (lo != 0))
        return _normal(k0 + used // ne, e0 + used % ne, hi[used], lo[used], nonfinite)
    ub, inv = np.unique((k - k0) * ne + (e - e0), return_inverse=True)
    hi = np.zeros(ub.size, dtype=np.int64)
    lo = np.zeros(ub.size, dtype=np.int64)
    np.add.at(hi, inv, sig >> _SPLIT)
    np.add.at(lo, inv, sig & _LO_MASK)
    return _normal(k0 + ub // ne, e0 + ub % ne, hi, lo, nonfinite)


def of_repeated(keys, values, common: float | None = None) -> Sums:
    """:func:`of` (the same sums, bit for bit) where many terms share one value, such as the areas of
    whole cells: the terms equal to ``common`` (default: the largest finite term) are counted per
    key and enter as ``count x`` their split, exact as integers; only the others are split one by
    one. ``keys``: one non-negative int per value, or one for all."""
    v = np.asarray(values, dtype="float64").ravel()
    k = np.broadcast_to(np.asarray(keys, dtype=np.int64), np.shape(values)).ravel()
    finite = np.isfinite(v)
    if common is None:
        common = float(v[finite].max()) if finite.any() else 0.0
    same = v == common
    if not np.isfinite(common) or common == 0.0 or not same.any():
        return of(k, v)
    rest = ~same
    k0 = int(k.min())
    counts = np.bincount(k[same] - k0)
    used = np.flatnonzero(counts)
    m, e = np.frexp(np.float64(common))
    sig = int(np.ldexp(m, _SIGNIFICAND_BITS))
    n = counts[used].astype(np.int64)
    repeated = _normal(k0 + used.astype(np.int64), np.full(used.size, int(e) - _SIGNIFICAND_BITS, dtype=np.int64),
                       n * (sig >> _SPLIT), n * (sig & _LO_MASK), np.zeros(0, dtype=np.int64))
    return merge([repeated, of(k[rest], v[rest])])


def _with_nonfinite(s: Sums, nonfinite) -> Sums:
    """``s`` with the keys of non-finite terms set."""
    return Sums(s.key, s.exp, s.hi, s.lo, np.unique(np.asarray(nonfinite, dtype=np.int64)))


def merge(parts) -> Sums:
    """The exact sums of several partial sums (the result does not depend on their order)."""
    parts = [p for p in parts]
    if not parts:
        return Sums.empty()
    key = np.concatenate([p.key for p in parts])
    exp = np.concatenate([p.exp for p in parts])
    hi = np.concatenate([p.hi for p in parts])
    lo = np.concatenate([p.lo for p in parts])
    nonfinite = np.concatenate([p.nonfinite for p in parts])
    if key.size == 0:
        return _with_nonfinite(Sums.empty(), nonfinite)
    order = np.lexsort((exp, key))
    key, exp, hi, lo = key[order], exp[order], hi[order], lo[order]
    start = np.flatnonzero(np.concatenate([[True], (key[1:] != key[:-1]) | (exp[1:] != exp[:-1])]))
    return _normal(key[start], exp[start], np.add.reduceat(hi, start), np.add.reduceat(lo, start), nonfinite)


def values(s: Sums) -> tuple[np.ndarray, np.ndarray]:
    """The keys with a non-zero or non-finite sum (ascending) and their float64 values."""
    if s.key.size == 0:
        keys = s.nonfinite
        return keys, np.full(keys.size, np.nan)
    part = np.ldexp(s.hi.astype("float64"), s.exp + _SPLIT) + np.ldexp(s.lo.astype("float64"), s.exp)
    start = np.flatnonzero(np.concatenate([[True], s.key[1:] != s.key[:-1]]))
    keys = s.key[start]
    # one fixed order inside a key (ascending exponent): a function of the exact sums only
    vals = np.add.reduceat(part, start)
    if s.nonfinite.size:
        keys_all = np.union1d(keys, s.nonfinite)
        out = np.zeros(keys_all.size)
        out[np.searchsorted(keys_all, keys)] = vals
        out[np.searchsorted(keys_all, s.nonfinite)] = np.nan
        return keys_all, out
    return keys, vals


def lookup(keys: np.ndarray, vals: np.ndarray, wanted) -> np.ndarray:
    """The values of ``wanted`` keys from :func:`values` (0.0 for a key without terms)."""
    w = np.asarray(wanted, dtype=np.int64)
    i = np.clip(np.searchsorted(keys, w), 0, max(keys.size - 1, 0))
    found = (keys.size > 0) & (keys[i] == w) if keys.size else np.zeros(w.shape, bool)
    return np.where(found, vals[i] if keys.size else 0.0, 0.0)


def total(values_) -> float:
    """The sum of all terms, independent of their order (one key)."""
    keys, vals = values(of(0, values_))
    return float(vals[0]) if vals.size else 0.0


def dense(s: Sums, n: int) -> np.ndarray:
    """The values of keys ``0 .. n-1`` of some sums as an array (0.0 for a key without terms)."""
    keys, vals = values(s)
    return lookup(keys, vals, np.arange(int(n)))
