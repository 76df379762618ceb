"""Tests of envelope.kernels.fragmentation against Jaeger's (2000) definitions and SciPy labelling."""

import numpy as np
import pytest
from scipy import ndimage

from envelope.errors import InputError
from envelope.kernels import fragmentation as fr


def three_patches():
    """100 cells of 1 km² with patches of 10, 20 and 30 cells, separated by empty rows."""
    mask = np.zeros((10, 10), bool)
    mask[0, :] = True          # 10 cells
    mask[2:4, :] = True        # 20 cells
    mask[5:8, :] = True        # 30 cells
    return mask


def test_effective_mesh_size_hand_computed():
    # Source: Jaeger 2000, Landscape Ecology 15:115-130, definition m_eff = (1/A_t) Σ A_i²:
    # (10² + 20² + 30²) / 100 = 1400 / 100 = 14 km².
    stats = fr.patch_statistics(three_patches(), 1.0)
    assert stats["n_patches"] == 3
    assert stats["habitat_area"] == pytest.approx(60.0)
    assert stats["region_area"] == pytest.approx(100.0)
    assert stats["effective_mesh_size"] == pytest.approx(14.0)
    assert fr.effective_mesh_size(three_patches(), 1.0) == pytest.approx(14.0)
    assert stats["mean_patch_area"] == pytest.approx(20.0)


def test_splitting_index_and_coherence_consistent():
    # Source: Jaeger 2000: C = Σ(A_i/A_t)², D = 1 - C, S = A_t²/ΣA_i², m_eff = A_t/S = C·A_t.
    mask = three_patches()
    s = fr.splitting_index(mask, 1.0)
    c = fr.degree_of_coherence(mask, 1.0)
    m = fr.effective_mesh_size(mask, 1.0)
    assert s == pytest.approx(100.0**2 / 1400.0)
    assert c == pytest.approx(0.14)
    assert 100.0 / s == pytest.approx(m)
    assert c * 100.0 == pytest.approx(m)
    assert fr.patch_statistics(mask, 1.0)["degree_of_division"] == pytest.approx(0.86)


def test_region_area_and_units():
    # Source: Jaeger 2000 definition; with A_t = 200 the same patches give 1400/200 = 7,
    # and 2 km² cells scale every area by 2: (20²+40²+60²)/200 = 28.
    mask = three_patches()
    assert fr.effective_mesh_size(mask, 1.0, region_area=200.0) == pytest.approx(7.0)
    assert fr.effective_mesh_size(mask, 2.0) == pytest.approx(28.0)


def test_connectivity_4_vs_8():
    # Source: definition of 4- (rook) and 8- (queen) adjacency; a diagonal line of 5 cells
    # is 5 patches of 1 cell under 4-connectivity, one patch of 5 under 8-connectivity.
    mask = np.eye(5, dtype=bool)
    s4 = fr.patch_statistics(mask, 1.0, connectivity=4)
    s8 = fr.patch_statistics(mask, 1.0, connectivity=8)
    assert s4["n_patches"] == 5 and s8["n_patches"] == 1
    assert s4["effective_mesh_size"] == pytest.approx(5 * 1.0 / 25.0)
    assert s8["effective_mesh_size"] == pytest.approx(25.0 / 25.0)


def test_patch_areas_per_row_areas_match_scipy_sum():
    # Source: reference library: scipy.ndimage.sum_labels over a full area grid.
    rng = np.random.default_rng(3)
    mask = rng.random((30, 40)) < 0.45
    row_area = np.linspace(2.0, 1.0, 30)
    areas = fr.patch_areas(mask, row_area, connectivity=8)
    labels, n = ndimage.label(mask, structure=np.ones((3, 3)))
    full = np.broadcast_to(row_area[:, None], mask.shape)
    expected = ndimage.sum_labels(full, labels, index=np.arange(1, n + 1))
    np.testing.assert_allclose(areas, expected, rtol=1e-12)
    # m_eff from its definition with A_t the whole grid's area
    m = fr.effective_mesh_size(mask, row_area, connectivity=8)
    assert m == pytest.approx(np.sum(expected**2) / full.sum(), rel=1e-12)


def test_no_habitat():
    # Source: Jaeger 2000: with no habitat Σ A_i² = 0, so m_eff = 0, C = 0 and S is unbounded.
    stats = fr.patch_statistics(np.zeros((4, 4), bool), 1.0)
    assert stats["n_patches"] == 0
    assert stats["effective_mesh_size"] == 0.0
    assert stats["splitting_index"] == np.inf
    assert np.isnan(stats["mean_patch_area"])


def test_one_patch_filling_region():
    # Source: Jaeger 2000: an undivided region has C = 1, S = 1 and m_eff = A_t.
    stats = fr.patch_statistics(np.ones((3, 4), bool), 0.5)
    assert stats["effective_mesh_size"] == pytest.approx(6.0)
    assert stats["splitting_index"] == pytest.approx(1.0)
    assert stats["degree_of_coherence"] == pytest.approx(1.0)


@pytest.mark.parametrize("kwargs, match", [
    ({"connectivity": 6}, "connectivity"),
    ({"region_area": 10.0}, "smaller than the habitat area"),
    ({"region_area": -1.0}, "region_area"),
])
def test_bad_arguments(kwargs, match):
    # Common practice, no source: bad arguments raise InputError naming the argument.
    with pytest.raises(InputError, match=match):
        fr.patch_statistics(three_patches(), 1.0, **kwargs)


def test_bad_inputs():
    # Common practice, no source.
    with pytest.raises(InputError, match="2-D"):
        fr.patch_areas(np.ones(5, bool), 1.0)
    with pytest.raises(InputError, match="one value per row"):
        fr.patch_areas(np.ones((3, 3), bool), np.ones(4))
    with pytest.raises(InputError, match="booleans"):
        fr.patch_areas(np.full((3, 3), 0.5), 1.0)
    with pytest.raises(InputError, match="> 0"):
        fr.patch_areas(np.ones((2, 2), bool), np.array([1.0, 0.0]))


def test_split_patches_blocks():
    # Analytic: a full 10 x 10 grid cut into 4 x 4 blocks gives 3 x 3 pieces of 16, 8 and 4 cells
    from envelope.kernels.fragmentation import split_patches

    labels, n = split_patches(np.ones((10, 10), dtype=bool), 4, 4)
    sizes = sorted(np.bincount(labels.ravel())[1:].tolist())
    assert n == 9 and sizes == [4, 8, 8, 8, 8, 16, 16, 16, 16]
    # every piece lies in one block
    for piece in range(1, n + 1):
        rows, cols = np.nonzero(labels == piece)
        assert len(set(rows // 4)) == 1 and len(set(cols // 4)) == 1


def test_split_patches_keeps_connectivity_inside_blocks():
    # Analytic: a U inside one block stays one piece; a bar across a block line becomes two
    from envelope.kernels.fragmentation import split_patches

    mask = np.zeros((6, 12), dtype=bool)
    mask[0:3, 0] = mask[2, 0:3] = mask[0:3, 2] = True      # U shape in block (0, 0)
    mask[4, 3:9] = True                                     # bar crossing the column line at 6
    labels, n = split_patches(mask, 6, 6)
    assert n == 3
    assert len(np.unique(labels[0:3, 0:3][mask[0:3, 0:3]])) == 1
    assert labels[4, 5] != labels[4, 6] and labels[4, 5] > 0 and labels[4, 6] > 0
    np.testing.assert_array_equal(labels > 0, mask)
    with pytest.raises(InputError, match="at least 1 x 1"):
        split_patches(mask, 0, 3)


def _periodic_components(mask, connectivity):
    """Reference: connected components of the explicit neighbour graph with x periodic (SciPy csgraph)."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    ny, nx = mask.shape
    idx = np.arange(ny * nx).reshape(ny, nx)
    steps = [(0, 1), (1, 0)] + ([(1, 1), (1, -1)] if connectivity == 8 else [])
    a, b = [], []
    for dy, dx in steps:
        src = idx[:ny - dy] if dy else idx
        dst = np.roll(idx, -dx, axis=1)[dy:]
        ok = mask.ravel()[src.ravel()] & mask.ravel()[dst.ravel()]
        a.append(src.ravel()[ok])
        b.append(dst.ravel()[ok])
    a, b = np.concatenate(a), np.concatenate(b)
    _, comp = connected_components(coo_matrix((np.ones(a.size), (a, b)), shape=(ny * nx,) * 2), directed=False)
    return comp.reshape(ny, nx)


@pytest.mark.parametrize("connectivity", [4, 8])
def test_periodic_labels_match_the_explicit_graph(connectivity):
    # Source: the definition of 4-/8-connectivity on a grid whose last column neighbours the
    # first, built as an explicit graph (scipy.sparse.csgraph.connected_components)
    rng = np.random.default_rng(3)
    for _ in range(20):
        mask = rng.uniform(size=(12, 15)) < 0.45
        labels, n = fr.label_patches(mask, connectivity=connectivity, periodic_x=True)
        ref = _periodic_components(mask, connectivity)
        assert n == np.unique(ref[mask]).size
        # same partition: a one-to-one map between our labels and the reference components
        pairs = np.unique(np.c_[labels[mask], ref[mask]], axis=0)
        assert len(pairs) == n and np.unique(pairs[:, 0]).size == n and np.unique(pairs[:, 1]).size == n
        assert sorted(np.unique(labels[mask]).tolist()) == list(range(1, n + 1))
        # numbered in raster order of each patch's first cell
        firsts = [np.flatnonzero(labels.ravel() == k)[0] for k in range(1, n + 1)]
        assert firsts == sorted(firsts)


def test_patch_across_the_seam_is_one():
    mask = np.zeros((3, 6), dtype=bool)
    mask[1, 0] = mask[1, 5] = True
    assert fr.label_patches(mask)[1] == 2
    labels, n = fr.label_patches(mask, periodic_x=True)
    assert n == 1 and labels[1, 0] == labels[1, 5] == 1
