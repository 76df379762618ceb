"""Habitat patches and Jaeger's (2000) landscape-division measures: effective mesh size, splitting index, coherence."""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from envelope.errors import InputError

__all__ = [
    "CONNECTIVITIES",
    "label_patches",
    "split_patches",
    "patch_areas",
    "patch_statistics",
    "effective_mesh_size",
    "splitting_index",
    "degree_of_coherence",
]

CONNECTIVITIES = (4, 8)


# --------------------------------------------------------------------------- checks


def _check_mask(mask, name="habitat_mask"):
    mask = np.asarray(mask)
    if mask.ndim != 2:
        raise InputError(f"{name}: expected a 2-D array (rows, columns), got shape {mask.shape}")
    if mask.dtype != bool:
        if not np.issubdtype(mask.dtype, np.number):
            raise InputError(f"{name}: expected a boolean array, got dtype {mask.dtype}")
        values = np.unique(mask[~np.isnan(mask)] if mask.dtype.kind == "f" else mask)
        if not np.isin(values, (0, 1)).all():
            raise InputError(f"{name}: expected booleans (or 0/1), found values {values[:5].tolist()}")
        mask = np.where(np.isnan(mask), False, mask).astype(bool) if mask.dtype.kind == "f" else mask.astype(bool)
    return mask


def _check_connectivity(connectivity):
    if connectivity not in CONNECTIVITIES:
        raise InputError(f"connectivity: expected 4 (rook) or 8 (queen), got {connectivity!r}")


def _cell_area_grid(cell_area, shape):
    """Broadcast `cell_area` (scalar, one value per row, or a full grid) to `shape`."""
    area = np.asarray(cell_area, dtype=np.float64)
    if area.ndim == 0:
        area = np.full(shape, float(area))
    elif area.ndim == 1:
        if area.shape[0] != shape[0]:
            raise InputError(f"cell_area: one value per row expected ({shape[0]} rows), got {area.shape[0]} values")
        area = np.broadcast_to(area[:, None], shape)
    elif area.shape != tuple(shape):
        raise InputError(f"cell_area: expected a scalar, {shape[0]} row values or shape {tuple(shape)}, "
                         f"got shape {area.shape}")
    if not np.isfinite(area).all() or (area <= 0).any():
        raise InputError("cell_area: every cell area must be finite and > 0")
    return area


# --------------------------------------------------------------------------- patches


def split_patches(mask, block_rows: int, block_cols: int, *, connectivity=4):
    """Label connected patches of ``mask`` that never cross the lines of a block grid.

    The grid is cut into blocks of ``block_rows`` x ``block_cols`` cells from the top-left
    corner; a patch is a connected group of True cells inside one block, so no patch holds
    more than one block of cells. Used to break large candidate areas into pieces of a
    size a restoration project can take on.

    Returns
    -------
    labels : ndarray of int, shape of ``mask``; 0 outside, 1..n inside
    n_patches : int
    """
    mask = _check_mask(mask, name="mask")
    if block_rows < 1 or block_cols < 1:
        raise InputError(f"block size must be at least 1 x 1 cells, got {block_rows} x {block_cols}")
    # an empty row (column) after every block keeps blocks from touching; label, then drop it
    rows = np.arange(block_rows, mask.shape[0], block_rows)
    cols = np.arange(block_cols, mask.shape[1], block_cols)
    spread = np.insert(np.insert(mask, rows, False, axis=0), cols, False, axis=1)
    labels, n = label_patches(spread, connectivity=connectivity)
    keep_rows = np.ones(spread.shape[0], dtype=bool)
    keep_rows[rows + np.arange(rows.size)] = False
    keep_cols = np.ones(spread.shape[1], dtype=bool)
    keep_cols[cols + np.arange(cols.size)] = False
    return labels[keep_rows][:, keep_cols], n


def label_patches(habitat_mask, *, connectivity=4, periodic_x=False):
    """Label the connected habitat patches of a boolean grid.

    Parameters
    ----------
    habitat_mask : ndarray of bool, shape (rows, columns)
        True where a cell is habitat.
    connectivity : {4, 8}, default=4
        4 joins cells that share an edge (rook's case); 8 also joins cells that touch at a
        corner (queen's case).
    periodic_x : bool, default=False
        The last column neighbours the first (a geographic grid that circles the globe):
        patches touching across that seam are one patch.

    Returns
    -------
    labels : ndarray of int, shape (rows, columns)
        0 outside habitat, 1..n_patches inside, numbered in the order their first cell
        appears row by row.
    n_patches : int

    References
    ----------
    SciPy ``scipy.ndimage.label`` (connected-component labelling) and
    ``scipy.sparse.csgraph.connected_components`` (joining labels across the seam).
    """
    mask = _check_mask(habitat_mask)
    _check_connectivity(connectivity)
    # rank-1 structure = edge neighbours only; rank-2 = edge and corner neighbours.
    structure = ndimage.generate_binary_structure(2, 1 if connectivity == 4 else 2)
    labels, n_patches = ndimage.label(mask, structure=structure)
    if periodic_x and n_patches > 1 and mask.shape[1] > 2:
        labels, n_patches = _join_across_seam(labels, int(n_patches), connectivity)
    return labels, int(n_patches)


def _join_across_seam(labels, n, connectivity):
    """Merge labels that meet across the east-west seam; renumber in raster order."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    east, west = labels[:, -1], labels[:, 0]
    pairs = [(east, west)]
    if connectivity == 8:  # corner neighbours across the seam, one row up and down
        pairs += [(east[:-1], west[1:]), (east[1:], west[:-1])]
    a = np.concatenate([p[0] for p in pairs])
    b = np.concatenate([p[1] for p in pairs])
    keep = (a > 0) & (b > 0)
    if not keep.any():
        return labels, n
    graph = coo_matrix((np.ones(int(keep.sum())), (a[keep], b[keep])), shape=(n + 1, n + 1))
    _, component = connected_components(graph, directed=False)
    # new ids in the order of each component's smallest old label (= raster order of first cells)
    first = np.full(component.max() + 1, n + 1)
    np.minimum.at(first, component[1:], np.arange(1, n + 1))
    order = np.argsort(first, kind="stable")
    rank = np.empty_like(order)
    rank[order] = np.arange(order.size)
    new = np.zeros(n + 1, dtype=labels.dtype)
    new[1:] = rank[component[1:]] + 1
    used = np.unique(new[1:]).size
    return new[labels], used


def patch_areas(habitat_mask, cell_area, *, connectivity=4):
    """Areas of the connected habitat patches.

    Parameters
    ----------
    habitat_mask : ndarray of bool, shape (rows, columns)
    cell_area : float or ndarray, shape () or (rows,) or (rows, columns)
        True area of each cell (any unit; the result is in the same unit). One value per row
        suits geographic grids, where cell area depends on latitude only.
    connectivity : {4, 8}, default=4

    Returns
    -------
    ndarray of float, shape (n_patches,)
        Patch areas in label order.
    """
    labels, n_patches = label_patches(habitat_mask, connectivity=connectivity)
    area = _cell_area_grid(cell_area, labels.shape)
    if n_patches == 0:
        return np.zeros(0)
    return np.bincount(labels.ravel(), weights=area.ravel(), minlength=n_patches + 1)[1:]


def patch_statistics(habitat_mask, cell_area, *, connectivity=4, region_area=None):
    """Patch counts and Jaeger's (2000) division measures of one reporting region.

    The reporting region is the whole array unless `region_area` says otherwise (e.g. the
    land area of a latitude band). Patches are counted only inside the array, so a patch cut
    by the array's edge counts with its inside part only: this is Jaeger's *cutting-out*
    procedure when the array is the reporting region.

    Parameters
    ----------
    habitat_mask : ndarray of bool, shape (rows, columns)
    cell_area : float or ndarray, shape () or (rows,) or (rows, columns)
    connectivity : {4, 8}, default=4
    region_area : float, optional
        Total area A_t of the reporting region; default the summed area of all cells of the
        array. Must be > 0 and at least the habitat area.

    Returns
    -------
    dict
        ``n_patches``, ``habitat_area``, ``region_area``, ``mean_patch_area`` (NaN with no
        patch), ``effective_mesh_size`` m_eff = Σ A_i² / A_t, ``splitting_index``
        S = A_t² / Σ A_i² (inf with no habitat), ``degree_of_coherence`` C = Σ (A_i/A_t)²
        and ``degree_of_division`` D = 1 − C.

    References
    ----------
    Jaeger, J.A.G. (2000) Landscape division, splitting index, and effective mesh size: new
    measures of landscape fragmentation. Landscape Ecology 15: 115–130.

    Examples
    --------
    >>> mask = np.zeros((10, 10), bool); mask[0, :10] = True; mask[2:4, :10] = True
    >>> patch_statistics(mask, 1.0)["effective_mesh_size"]
    5.0
    """
    mask = _check_mask(habitat_mask)
    areas = patch_areas(mask, cell_area, connectivity=connectivity)
    if region_area is None:
        region_area = float(_cell_area_grid(cell_area, mask.shape).sum())
    region_area = float(region_area)
    habitat_area = float(areas.sum())
    if not np.isfinite(region_area) or region_area <= 0:
        raise InputError(f"region_area: expected a finite area > 0, got {region_area}")
    # a small relative slack for round-off when the region is exactly the habitat
    if habitat_area > region_area * (1 + 1e-9):
        raise InputError(f"region_area: {region_area:g} is smaller than the habitat area {habitat_area:g}")
    sum_sq = float(np.sum(areas**2))
    # Jaeger (2000), eqs for C, D, S and m_eff: C = Σ(A_i/A_t)², D = 1 − C, S = A_t²/ΣA_i², m = A_t/S.
    coherence = sum_sq / region_area**2
    return {
        "n_patches": int(areas.size),
        "habitat_area": habitat_area,
        "region_area": region_area,
        "mean_patch_area": habitat_area / areas.size if areas.size else float("nan"),
        "effective_mesh_size": sum_sq / region_area,
        "splitting_index": region_area**2 / sum_sq if sum_sq > 0 else float("inf"),
        "degree_of_coherence": coherence,
        "degree_of_division": 1.0 - coherence,
    }


def effective_mesh_size(habitat_mask, cell_area, *, connectivity=4, region_area=None):
    """Effective mesh size m_eff = (1/A_t) Σ A_i² of the habitat patches (Jaeger 2000).

    The area a randomly placed individual can reach without leaving habitat, averaged over
    the reporting region: m_eff = A_t · C, where C is the probability that two random
    points of the region lie in the same patch. Same unit as `cell_area`.

    Parameters
    ----------
    habitat_mask : ndarray of bool, shape (rows, columns)
    cell_area : float or ndarray, shape () or (rows,) or (rows, columns)
    connectivity : {4, 8}, default=4
    region_area : float, optional
        A_t; default the summed area of all cells of the array (see `patch_statistics`).

    Returns
    -------
    float

    References
    ----------
    Jaeger, J.A.G. (2000) Landscape division, splitting index, and effective mesh size: new
    measures of landscape fragmentation. Landscape Ecology 15: 115–130.
    """
    return patch_statistics(habitat_mask, cell_area, connectivity=connectivity,
                            region_area=region_area)["effective_mesh_size"]


def splitting_index(habitat_mask, cell_area, *, connectivity=4, region_area=None):
    """Splitting index S = A_t² / Σ A_i² (Jaeger 2000): the number of equal patches giving the same m_eff.

    Returns inf when there is no habitat. See `patch_statistics` for the parameters.

    References
    ----------
    Jaeger, J.A.G. (2000) Landscape Ecology 15: 115–130.
    """
    return patch_statistics(habitat_mask, cell_area, connectivity=connectivity,
                            region_area=region_area)["splitting_index"]


def degree_of_coherence(habitat_mask, cell_area, *, connectivity=4, region_area=None):
    """Degree of coherence C = Σ (A_i / A_t)² (Jaeger 2000): the chance two random points share a patch.

    See `patch_statistics` for the parameters.

    References
    ----------
    Jaeger, J.A.G. (2000) Landscape Ecology 15: 115–130.
    """
    return patch_statistics(habitat_mask, cell_area, connectivity=connectivity,
                            region_area=region_area)["degree_of_coherence"]
