"""Row blocks of a grid: where a grid-sized temporary is avoided by working a block of rows at a time."""

from __future__ import annotations

import math

__all__ = ["ROW_BLOCK_CELLS", "row_blocks"]

#: Cells per block of rows (about 8 MiB of float64 per temporary): small beside a grid of
#: 10 000 x 10 000 cells, large enough that the Python loop over blocks costs nothing.
ROW_BLOCK_CELLS = 1 << 20


def row_blocks(shape, cells: int | None = None) -> list:
    """Slices of the first axis of an array of ``shape`` covering it in blocks of about
    ``cells`` cells (default :data:`ROW_BLOCK_CELLS`, read at each call; at least one row
    each; the cells of a row are the product of the other axes)."""
    cells = ROW_BLOCK_CELLS if cells is None else int(cells)
    per_row = max(1, math.prod(int(s) for s in shape[1:]))
    rows = max(1, cells // per_row)
    return [slice(r, r + rows) for r in range(0, int(shape[0]), rows)]
