"""`describe_grid` on a large sparse tiled GeoTIFF: only stored blocks are read, and the answer equals the full read."""

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin
from rasterio.windows import Window

from envelope.pipelines import info


def _sparse(path, size=4096, tile=256):
    """A tiled GeoTIFF (GDAL SPARSE_OK) with data in three tiles only; returns what was written."""
    rng = np.random.default_rng(5)
    written = {}
    with rasterio.open(path, "w", driver="GTiff", height=size, width=size, count=2, dtype="float32",
                       crs="EPSG:4326", transform=from_origin(-150.0, 46.0, 0.001, 0.001), nodata=-9999.0,
                       tiled=True, blockxsize=tile, blockysize=tile, SPARSE_OK="TRUE") as dst:
        dst.descriptions = ("t", "p")
        for row, col in ((0, 0), (3, 7), (15, 15)):
            block = rng.normal(10, 3, (2, tile, tile)).astype("float32")
            block[1, :5, :] = -9999.0  # some nodata inside a stored tile
            dst.write(block, window=Window(col * tile, row * tile, tile, tile))
            written[(row, col)] = block
    return written


def test_stored_blocks_only_and_same_answer_as_a_full_read(tmp_path, monkeypatch):
    from envelope.io.blocks import stored_windows

    path = tmp_path / "sparse.tif"
    written = _sparse(path)
    windows, n_blocks = stored_windows(path)
    # Source: the file's block index (GDAL SPARSE_OK writes no bytes for untouched tiles)
    assert n_blocks == 16 * 16 and len(windows) == 3
    monkeypatch.setattr(info, "STREAM_CELLS", 10**12)
    full = info.describe_grid(path)           # the dask path over every cell
    monkeypatch.setattr(info, "STREAM_CELLS", 1000)
    blocks = info.describe_grid(path)         # stored blocks only
    assert blocks["nodata_share"] == pytest.approx(full["nodata_share"], abs=1e-12)
    assert blocks["valid_area_km2"] == pytest.approx(full["valid_area_km2"], rel=1e-9)
    for a, b in zip(blocks["variables"], full["variables"]):
        assert a["min"] == pytest.approx(b["min"]) and a["max"] == pytest.approx(b["max"])
        assert a["nodata_share"] == pytest.approx(b["nodata_share"], abs=1e-12)
    # Analytic: values and counts straight from the arrays written
    values = np.stack([w for w in written.values()])
    t = values[:, 0]
    assert blocks["variables"][0]["min"] == pytest.approx(float(t.min()))
    valid_cells = sum(int((w[1] != -9999.0).sum()) for w in written.values())
    assert blocks["nodata_share"] == pytest.approx(1 - valid_cells / 4096**2, abs=1e-12)


def _with_overviews(path, *, stats):
    """256 x 256 single-band grid, valid in whole 4 x 4 blocks (so a factor-4 average
    overview sees exactly the valid region), GDAL overviews 2 and 4, optional GDAL statistics."""
    from rasterio.enums import Resampling

    rng = np.random.default_rng(2)
    values = rng.normal(10, 3, (256, 256)).astype("float32")
    coarse = rng.uniform(size=(64, 64)) < 0.3
    values[np.kron(coarse, np.ones((4, 4), bool))] = -9999.0
    with rasterio.open(path, "w", driver="GTiff", height=256, width=256, count=1, dtype="float32",
                       crs="EPSG:4326", transform=from_origin(-150.0, 46.0, 0.01, 0.01), nodata=-9999.0,
                       tiled=True, blockxsize=64, blockysize=64) as dst:
        dst.write(values[None])
        dst.build_overviews([2, 4], Resampling.average)
    if stats:
        with rasterio.open(path, "r+") as dst:
            dst.stats(indexes=[1], approx=False)  # GDALComputeRasterStatistics: STATISTICS_* tags
    return values


def test_quick_answers_from_statistics_tags_and_overview(tmp_path, monkeypatch):
    path = tmp_path / "ov.tif"
    values = _with_overviews(path, stats=True)
    exact = info.describe_grid(path)
    monkeypatch.setattr(info, "QUICK_CELLS", 64 * 64)   # the factor-4 overview qualifies, factor 2 does not
    quick = info.describe_grid(path, quick=True)
    assert exact["source"] == {"ranges": "data", "area": "data"}
    assert quick["source"] == {"ranges": "statistics tags", "area": "overview 64 x 64"}
    valid = values != -9999.0
    # Source: GDAL's own statistics (STATISTICS_MINIMUM/MAXIMUM) equal NumPy's on the data
    assert quick["variables"][0]["min"] == pytest.approx(float(values[valid].min()), rel=1e-6)
    assert quick["variables"][0]["max"] == pytest.approx(float(values[valid].max()), rel=1e-6)
    # (GDAL writes STATISTICS_VALID_PERCENT with 4 significant digits)
    assert quick["variables"][0]["nodata_share"] == pytest.approx(1 - valid.mean(), abs=1e-3)
    # Analytic: nodata lies in whole 4 x 4 blocks, so the factor-4 overview's valid cells
    # cover exactly the valid region and the estimate equals the full computation
    assert quick["nodata_share"] == pytest.approx(exact["nodata_share"], abs=1e-12)
    assert quick["valid_area_km2"] == pytest.approx(exact["valid_area_km2"], rel=1e-9)


def test_quick_without_metadata_reads_the_data(tmp_path, monkeypatch):
    path = tmp_path / "plain.tif"
    with rasterio.open(path, "w", driver="GTiff", height=32, width=32, count=1, dtype="float32", crs="EPSG:4326",
                       transform=from_origin(-150.0, 46.0, 0.01, 0.01), nodata=-9999.0) as dst:
        dst.write(np.arange(32 * 32, dtype="float32").reshape(1, 32, 32))
    quick = info.describe_grid(path, quick=True)
    assert quick["source"] == {"ranges": "data", "area": "data"}
    assert quick["variables"][0]["max"] == 32 * 32 - 1  # Analytic: the values written


def test_quick_with_overview_only_and_progress(tmp_path, monkeypatch):
    path = tmp_path / "ov.tif"
    values = _with_overviews(path, stats=False)
    monkeypatch.setattr(info, "QUICK_CELLS", 64 * 64)
    quick = info.describe_grid(path, quick=True)
    assert quick["source"] == {"ranges": "overview 64 x 64", "area": "overview 64 x 64"}
    # Analytic: an average overview's range lies inside the data's range
    valid = values != -9999.0
    assert values[valid].min() <= quick["variables"][0]["min"] <= quick["variables"][0]["max"] <= values[valid].max()
    seen = []
    monkeypatch.setattr(info, "STREAM_CELLS", 1000)
    info.describe_grid(path, progress=lambda done, total, what: seen.append((done, total)))
    assert seen and seen[0] == (0, 16)
