"""Library warnings reach the user through the tool's logging, one line each, not raw on stderr."""

import subprocess
import sys

import numpy as np
import rasterio


def test_rasterio_warning_is_one_logged_line(tmp_path):
    # Source: rasterio warns NotGeoreferencedWarning when it opens a GeoTIFF without a
    # geotransform (rasterio.errors); Python prints such warnings raw, with a source line
    path = tmp_path / "nogeo.tif"
    with rasterio.open(path, "w", driver="GTiff", height=4, width=4, count=1, dtype="float32") as dst:
        dst.write(np.ones((1, 4, 4), "float32"))
    proc = subprocess.run([sys.executable, "-m", "envelope.cli.main", "info", str(path)], capture_output=True,
                          text=True)
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert lines[0].startswith("WARNING envelope.warnings: NotGeoreferencedWarning: Dataset has no geotransform")
    assert lines[-1].startswith("Error: ") and "nogeo.tif" in lines[-1]
    assert len(lines) == 2 and "site-packages" not in proc.stderr


def test_numpy_warning_is_routed(caplog):
    # Source: numpy warns RuntimeWarning on the mean of an empty slice (numpy.nanmean docs)
    import warnings

    from envelope.cli.logsetup import route_warnings

    with caplog.at_level("WARNING", logger="envelope.warnings"), warnings.catch_warnings():
        warnings.simplefilter("always")
        route_warnings()  # undone when catch_warnings restores showwarning
        np.nanmean(np.array([np.nan]))
    assert "RuntimeWarning: Mean of empty slice" in caplog.text
