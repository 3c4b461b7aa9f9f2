"""Stored arrays: the one table that says what a fitted baseline keeps in ``model.npz``.

Stage: model → **baselines** (storage). Each row of the table names an array, its dtype, how
its shape relates to the others (named dimensions: ``("K", "V")`` is clusters × vocabulary,
``("K+1",)`` one more than K) and the range of its values. Saving checks the arrays against
the table before writing; loading checks the file's array headers against it before reading a
byte of data, then the values — both with the functions below, so they cannot disagree.

Two kinds of rows need more than a range: *offsets* into another array (CSR-style: start at 0,
never decrease, end at that array's length) and *names* (a list of strings kept as indices into
one list of names in the manifest; :func:`encode_names` and :func:`decode_names` are the only
two directions of that mapping).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

FLOAT_SLACK = 1e-9  # rounding allowed beyond a float range's ends (a k-means centre of unit vectors)


@dataclass(frozen=True)
class Array:
    """One row of the storage table."""

    name: str
    dtype: str  # numpy dtype string, little-endian: "<f8", "<f4", "<i8"
    shape: tuple[str, ...]  # a named dimension per axis ("X+1": one more than X) or a number
    low: float | None = None  # every value ≥ low
    high: float | str | None = None  # every value ≤ high (a number), or < that dimension (a name)
    # (an offsets column need not say more; a names column's values are checked against its list)
    offsets_of: str | None = None  # offsets into that array (see the module docstring)
    names: str | None = None  # indices into this list of names (kept in the manifest)


class ArrayError(ValueError):
    """An array that does not fit the table: the message says which and how."""


def _axis(spec: str) -> tuple[str, int]:
    name, _, plus = spec.partition("+")
    return name, int(plus or 0)


def check_shapes(headers: Mapping[str, tuple[np.dtype, tuple[int, ...]]], table: tuple[Array, ...],
                 dims: dict[str, int]) -> dict[str, int]:
    """Check every array's dtype and shape (from its header: nothing read yet) against the
    table; dimensions not given in ``dims`` are learned from the first array that has them.
    Returns all the dimensions."""
    dims = dict(dims)
    missing = [a.name for a in table if a.name not in headers]
    extra = sorted(set(headers) - {a.name for a in table})
    if missing or extra:
        raise ArrayError(f"arrays missing: {', '.join(missing) or 'none'}; unexpected: {', '.join(extra) or 'none'}")
    for a in table:
        dtype, shape = headers[a.name]
        if np.dtype(dtype) != np.dtype(a.dtype):
            raise ArrayError(f"{a.name}: dtype {np.dtype(dtype).str}, expected {a.dtype}")
        if len(shape) != len(a.shape):
            raise ArrayError(f"{a.name}: {len(shape)} dimensions, expected {len(a.shape)}")
        for size, spec in zip(shape, a.shape):
            name, plus = _axis(spec)
            if name.isdigit():
                if size != int(name) + plus:
                    raise ArrayError(f"{a.name}: shape {tuple(shape)}, expected length {spec}")
            elif name not in dims:
                if size < plus:
                    raise ArrayError(f"{a.name}: length {size} cannot be {spec}")
                dims[name] = size - plus
            elif size != dims[name] + plus:
                raise ArrayError(f"{a.name}: shape {tuple(shape)} does not match {spec} = {dims[name] + plus}")
    return dims


def check_values(arrays: Mapping[str, np.ndarray], table: tuple[Array, ...], dims: Mapping[str, int]) -> None:
    """Check every array's values: finite floats within their range, integer indices below
    their dimension, offsets that cut their array into consecutive runs."""
    for a in table:
        x = arrays[a.name]
        if x.size == 0:
            continue
        if x.dtype.kind == "f":
            if not np.isfinite(x).all():
                raise ArrayError(f"{a.name}: not every value is a finite number")
            lo = None if a.low is None else a.low - FLOAT_SLACK
            hi = None if a.high is None else float(a.high) + FLOAT_SLACK
        else:  # integers; a names column indexes its list
            lo = 0 if a.names is not None else a.low
            high = a.names if a.names is not None else a.high
            hi = None if high is None else (dims[high] - 1 if isinstance(high, str) else high)
        if lo is not None and x.min() < lo:
            raise ArrayError(f"{a.name}: a value below its range (at least {a.low if a.names is None else 0})")
        if hi is not None and x.max() > hi:
            raise ArrayError(f"{a.name}: a value above its range (at most {hi})")
        if a.offsets_of is not None:
            target = len(arrays[a.offsets_of])
            if x[0] != 0 or x[-1] != target or (np.diff(x) < 0).any():
                raise ArrayError(f"{a.name}: not offsets into {a.offsets_of} (0, non-decreasing, ending at {target})")


def encode_names(arrays: Mapping[str, object], table: tuple[Array, ...]) -> tuple[dict[str, object], dict[str, list[str]]]:
    """The arrays with every *names* column as indices, and each list of names they index
    (sorted: every name any such column holds)."""
    lists: dict[str, list[str]] = {}
    for a in table:
        if a.names is not None:
            lists.setdefault(a.names, [])
            lists[a.names] = sorted(set(lists[a.names]) | set(arrays[a.name]))
    out = dict(arrays)
    for a in table:
        if a.names is not None:
            index = {n: i for i, n in enumerate(lists[a.names])}
            out[a.name] = np.array([index[n] for n in arrays[a.name]], dtype=a.dtype)
    return out, lists


def decode_names(arrays: Mapping[str, np.ndarray], table: tuple[Array, ...],
                 lists: Mapping[str, list[str]]) -> dict[str, object]:
    """The inverse of :func:`encode_names` (indices already checked against the lists' lengths)."""
    out: dict[str, object] = dict(arrays)
    for a in table:
        if a.names is not None:
            names = lists[a.names]
            out[a.name] = [names[i] for i in arrays[a.name].tolist()]
    return out


def name_dims(table: tuple[Array, ...], lists: Mapping[str, list[str]]) -> dict[str, int]:
    """The dimension each *names* column's indices must stay below: its list's length."""
    return {a.names: len(lists[a.names]) for a in table if a.names is not None}
