"""Row blocks of a grid (envelope.kernels.rowblocks)."""

import numpy as np
import pytest

from envelope.kernels.rowblocks import row_blocks


@pytest.mark.parametrize("shape, cells", [((10, 7), 20), ((10, 7), 7), ((10, 7), 3), ((5, 3, 4), 24), ((1, 9), 1 << 20),
                                          ((0, 4), 8)])
def test_row_blocks_cover_every_row_once_in_order(shape, cells):
    # Analytic: the slices, applied in order to numpy.arange, give every row exactly once; each
    # holds at least one row and at most max(1, cells // cells-per-row) rows
    rows = np.arange(shape[0])
    blocks = row_blocks(shape, cells)
    np.testing.assert_array_equal(np.concatenate([rows[b] for b in blocks]) if blocks else rows, rows)
    per_row = int(np.prod(shape[1:]))
    assert all(1 <= rows[b].size <= max(1, cells // per_row) for b in blocks)
