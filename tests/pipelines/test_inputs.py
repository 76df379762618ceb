"""The shared inputs of the change, reach and target pipelines: one threshold resolver, one reach-input builder."""

import numpy as np
import pytest

from envelope.errors import GridMismatchError, InputError
from envelope.io.writing import write_raster
from envelope.pipelines.inputs import build_reach_inputs, resolve_threshold
from envelope.reach import DispersalSettings
from tests.test_reach import layer


def test_resolve_threshold_rules():
    # Common practice, no source: the contract of the one resolver used by change, reach and target.
    assert resolve_threshold({"now.tif": {"threshold": 0.3, "threshold_rule": "max_tss"},
                              "f.tif": {"threshold": 0.3}}) == (0.3, "max_tss")
    assert resolve_threshold({"now.tif": {"threshold": "0.3"}, "f.tif": {}}) == (0.3, None)
    assert resolve_threshold({"now.tif": {}, "f.tif": {"threshold": 0.25}}) == (0.25, None)
    assert resolve_threshold({"a.tif": {}, "b.tif": {}}, 0.2) == (0.2, "given")
    assert resolve_threshold({"a.tif": {"threshold": 0.3}, "b.tif": {"threshold": 0.4}}, 0.2) == (0.2, "given")
    with pytest.raises(InputError, match="now.tif has no 'threshold' tag; pass --threshold"):
        resolve_threshold({"now.tif": {}, "f.tif": {}})
    with pytest.raises(InputError, match=r"disagree \(a.tif: 0.3, b.tif: 0.4\); pass --threshold"):
        resolve_threshold({"a.tif": {"threshold": 0.3}, "b.tif": {"threshold": 0.4}})
    with pytest.raises(InputError, match="a.tif: tag 'threshold'.*between 0 and 1"):
        resolve_threshold({"a.tif": {"threshold": 7}})
    with pytest.raises(InputError, match="--threshold: found 1.5"):
        resolve_threshold({"a.tif": {}}, 1.5)


def _files(tmp_path, threshold=0.5):
    now = np.zeros((6, 8), "float32")
    now[:, :3] = 0.9
    fut = np.full((6, 8), 0.9, "float32")
    paths = {}
    for name, values in (("now", now), ("f2050", fut), ("f2080", fut)):
        paths[name] = write_raster(layer(values), tmp_path / f"{name}.tif", tags={"threshold": threshold})
    paths["habitat"] = write_raster(layer(np.ones((6, 8), "float32")), tmp_path / "habitat.tif")
    start = np.zeros((6, 8), "float32")
    start[:, 0] = 1
    paths["start"] = write_raster(layer(start), tmp_path / "start.tif")
    return paths


def test_build_reach_inputs_opens_checks_and_resolves(tmp_path):
    # Common practice, no source: what the builder hands to reach, target and the runner.
    p = _files(tmp_path)
    model = build_reach_inputs(p["now"], {None: [(2080, p["f2080"]), (2050, p["f2050"])]}, p["habitat"], p["start"],
                               settings=DispersalSettings(mean_distance_km=2.0), now_year=2020, step_years=5)
    assert model.threshold == 0.5 and model.threshold_rule is None
    assert [y for y, _ in model.single_path()] == [2080.0, 2050.0]
    assert model.start.sum() == 6 and model.start_info["kind"] == "raster"
    assert float(model.habitat.min()) == 1.0
    assert model.timing() == {"now_year": 2020.0, "step_years": 5.0, "rate": 1.0, "persistence_years": 0.0}


def test_build_reach_inputs_names_a_mismatched_future(tmp_path):
    # Common practice, no source: a grid mismatch names the file and the first difference.
    p = _files(tmp_path)
    odd = write_raster(layer(np.ones((5, 8), "float32")), tmp_path / "odd.tif", tags={"threshold": 0.5})
    with pytest.raises(GridMismatchError, match=r"--future .*odd.tif: shape 5 x 8"):
        build_reach_inputs(p["now"], {None: [(2050, odd)]}, p["habitat"], p["start"],
                           settings=DispersalSettings(mean_distance_km=2.0))
