"""Grids kept compactly and losslessly: occupancy as bit masks of its exact 0, 1 and NaN cells, arrival years as codes."""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from envelope.errors import InputError

__all__ = ["CodedGrid", "PackedGrid", "PackedSnapshots", "code_grid", "pack_grid"]

# Cells handled per pass while packing or unpacking: the temporaries stay a few MB whatever
# the grid's size. A multiple of 8, so that the bit masks of the chunks join end to end.
_CHUNK_CELLS = 1 << 22


class PackedGrid:
    """A 2-D float grid stored as bit masks of its exact 0, 1 and NaN cells plus the other cells' values.

    An occupancy grid of a spread run is mostly exact 0 (not reached) and exact 1 (saturated
    or colonised), with fractional values only in a band behind the front; its bit masks
    take 1/16 of the float32 grid (1/32 for float64) and the fractional cells 8 or 12 bytes
    each. When that would not be smaller than the grid itself, the grid is kept as a
    plain copy. Either way :meth:`unpack` gives back the very same bits (``+0.0``, ``1.0``
    and the dtype's default NaN are matched bit for bit; ``-0.0`` or any other NaN is kept
    among the other values).
    """

    __slots__ = ("shape", "dtype", "ones", "nans", "index", "values", "dense")

    def __init__(self, shape, dtype, ones=None, nans=None, index=None, values=None, dense=None):
        self.shape, self.dtype = tuple(shape), np.dtype(dtype)
        self.ones, self.nans, self.index, self.values, self.dense = ones, nans, index, values, dense

    @property
    def nbytes(self) -> int:
        """Bytes held (the masks and values, or the plain copy)."""
        if self.dense is not None:
            return int(self.dense.nbytes)
        return int(self.ones.nbytes + self.nans.nbytes + self.index.nbytes + self.values.nbytes)

    def unpack(self) -> np.ndarray:
        """The grid as a new array (C order), bit for bit the one packed."""
        if self.dense is not None:
            return self.dense.copy()
        n = int(np.prod(self.shape))
        flat = np.zeros(n, dtype=self.dtype)
        for lo in range(0, n, _CHUNK_CELLS):
            hi = min(lo + _CHUNK_CELLS, n)
            part = flat[lo:hi]
            part[np.unpackbits(self.ones[lo // 8:(hi + 7) // 8], count=hi - lo).view(bool)] = 1.0
            part[np.unpackbits(self.nans[lo // 8:(hi + 7) // 8], count=hi - lo).view(bool)] = np.nan
        flat[self.index] = self.values
        return flat.reshape(self.shape)


def pack_grid(values) -> PackedGrid:
    """Pack a 2-D float32 or float64 grid (:class:`PackedGrid`); the grid itself is not kept or changed."""
    a = np.asarray(values)
    if a.ndim != 2 or a.dtype not in (np.float32, np.float64):
        raise InputError(f"values must be a 2-D float32 or float64 grid, got {a.ndim}-D {a.dtype}")
    flat = np.ascontiguousarray(a).reshape(-1)
    n = flat.size
    bits = flat.view(np.uint32 if a.dtype == np.float32 else np.uint64)
    one, nan = (np.array([v], dtype=a.dtype).view(bits.dtype)[0] for v in (1.0, np.nan))
    index_dtype = np.uint32 if n <= np.iinfo(np.uint32).max else np.int64
    per_other = np.dtype(index_dtype).itemsize + a.dtype.itemsize
    # more "other" cells than this and the masks plus values would be no smaller than a copy
    limit = (n * a.dtype.itemsize - 2 * ((n + 7) // 8)) // per_other
    ones, nans, index, kept = [], [], [], []
    count = 0
    for lo in range(0, n, _CHUNK_CELLS):
        b = bits[lo:lo + _CHUNK_CELLS]
        is_one, is_nan = b == one, b == nan
        other = ~(is_one | is_nan)
        other &= b != 0
        where = np.flatnonzero(other)
        count += where.size
        if count > limit:
            return PackedGrid(a.shape, a.dtype, dense=flat.reshape(a.shape).copy())
        ones.append(np.packbits(is_one))
        nans.append(np.packbits(is_nan))
        index.append((where + lo).astype(index_dtype))
        kept.append(flat[lo:lo + _CHUNK_CELLS][where])
    join = np.concatenate
    return PackedGrid(a.shape, a.dtype, ones=join(ones) if ones else np.zeros(0, np.uint8),
                      nans=join(nans) if nans else np.zeros(0, np.uint8),
                      index=join(index) if index else np.zeros(0, index_dtype),
                      values=join(kept) if kept else np.zeros(0, a.dtype))


class PackedSnapshots(Mapping):
    """Year -> grid, kept packed (:class:`PackedGrid`); each look-up unpacks a new array.

    ``then`` (optional) is applied to every unpacked grid before it is handed out, e.g. to
    wrap it as a labelled layer; :meth:`mapped` makes a view with another such function
    over the same packed grids.
    """

    def __init__(self, packed=None, then=None):
        self._packed = dict(packed or {})
        self._then = then

    def add(self, year, values) -> None:
        """Pack ``values`` and keep it under ``year``."""
        self._packed[year] = pack_grid(values)

    def mapped(self, then) -> "PackedSnapshots":
        """The same packed grids, each look-up passed through ``then``."""
        return PackedSnapshots(self._packed, then)

    @property
    def nbytes(self) -> int:
        """Bytes held by all packed grids."""
        return sum(p.nbytes for p in self._packed.values())

    def __getitem__(self, year):
        grid = self._packed[year].unpack()
        return grid if self._then is None else self._then(grid)

    def __iter__(self):
        return iter(self._packed)

    def __len__(self):
        return len(self._packed)


class CodedGrid:
    """A float grid of few distinct values as ``uint8`` / ``uint16`` codes into a sorted table of them.

    Meant for arrival-year grids, whose cells hold one of a few step years or NaN: 1 or 2
    bytes a cell instead of 4 or 8. :meth:`values` gives back the very values coded (every
    NaN as the table's one NaN).
    """

    __slots__ = ("codes", "table")

    def __init__(self, codes: np.ndarray, table: np.ndarray):
        self.codes, self.table = codes, table

    @property
    def shape(self) -> tuple:
        return self.codes.shape

    @property
    def nbytes(self) -> int:
        return int(self.codes.nbytes + self.table.nbytes)

    def values(self, rows=slice(None), *, nan=None) -> np.ndarray:
        """The grid's rows ``rows`` as a new array; ``nan``, when given, stands in for NaN."""
        table = self.table if nan is None else np.where(np.isnan(self.table), nan, self.table).astype(self.table.dtype)
        return table[self.codes[rows]]


def code_grid(values, max_levels: int = 65_535) -> CodedGrid | None:
    """Code a 2-D float grid (:class:`CodedGrid`), or None when it holds more than ``max_levels``
    distinct values (NaN counted once); the grid itself is not kept or changed."""
    import pandas as pd

    a = np.asarray(values)
    if a.ndim != 2 or a.dtype.kind != "f":
        raise InputError(f"values must be a 2-D float grid, got {a.ndim}-D {a.dtype}")
    flat = a.reshape(-1)
    distinct, has_nan = set(), False
    for lo in range(0, flat.size, _CHUNK_CELLS):  # hashing, not sorting: one linear pass
        found = pd.unique(flat[lo:lo + _CHUNK_CELLS])
        nan = np.isnan(found)
        has_nan |= bool(nan.any())
        distinct.update(found[~nan].tolist())
        if len(distinct) + has_nan > max_levels:
            return None
    # NaN last, where searchsorted puts it
    table = np.array(sorted(distinct) + ([np.nan] if has_nan else []), dtype=a.dtype)
    codes = np.empty(flat.size, dtype=np.uint8 if table.size <= 256 else np.uint16)
    for lo in range(0, flat.size, _CHUNK_CELLS):
        codes[lo:lo + _CHUNK_CELLS] = np.searchsorted(table, flat[lo:lo + _CHUNK_CELLS])
    return CodedGrid(codes.reshape(a.shape), table)
