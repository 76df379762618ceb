"""Climate layers by name: NAME=PATH[:BAND], layer tables, scenario tables with a file per variable."""

import numpy as np
import pytest
import xarray as xr
import rioxarray  # noqa: F401

from envelope.errors import GridMismatchError, InputError, LayerError
from envelope.grids import match_variables
from envelope.io.layers import ClimateLayer, parse_layer, read_layer_table
from envelope.io.rasters import open_climate
from envelope.io.tables import read_scenarios
from envelope.io.writing import write_raster


def _write(path, values, names=None, res=0.5, lon0=-150.0):
    values = np.asarray(values, dtype=np.float32)
    if values.ndim == 2:
        values = values[None]
    n, ny, nx = values.shape
    da = xr.DataArray(values, dims=("variable", "y", "x"),
                      coords={"variable": names or [f"v{i}" for i in range(n)],
                              "y": -40.0 - res * (np.arange(ny) + 0.5), "x": lon0 + res * (np.arange(nx) + 0.5)})
    write_raster(da.rio.write_crs("EPSG:4326") if n > 1 else da.isel(variable=0).rio.write_crs("EPSG:4326"), path)
    return path


@pytest.fixture
def files(tmp_path):
    # a portal's per-variable files: stems that are not variable names, no band descriptions
    a = _write(tmp_path / "portal_tmax_warmest.tif", np.full((3, 4), 1.0))
    stack = _write(tmp_path / "stack.tif", np.stack([np.full((3, 4), 10.0), np.full((3, 4), 20.0)]),
                   names=["first", "second"])
    return tmp_path, a, stack


def test_parse_layer_forms(files):
    folder, a, stack = files
    # Common practice, no source: the option's own grammar
    assert parse_layer(str(a)) == a
    assert parse_layer(f"bio5={a}") == ClimateLayer("bio5", a)
    assert parse_layer(f"bio12={stack}:2") == ClimateLayer("bio12", stack, 2)
    assert parse_layer(f"bio12={stack}:second") == ClimateLayer("bio12", stack, "second")
    assert str(parse_layer(f"bio12={stack}:2")) == f"bio12={stack}:2"
    with pytest.raises(InputError, match="file .*missing.tif not found"):
        parse_layer(f"bio5={folder / 'missing.tif'}")
    with pytest.raises(InputError, match="layer name '5bio'"):
        parse_layer(f"5bio={a}")


def test_named_layers_open_as_one_stack_under_the_given_names(files):
    _, a, stack = files
    grid = open_climate([ClimateLayer("bio5", a), ClimateLayer("bio12", stack, 2), ClimateLayer("bio6", stack, "first")])
    assert grid["variable"].values.tolist() == ["bio5", "bio12", "bio6"]
    # Analytic: constant test bands 1, 20 and 10
    np.testing.assert_array_equal(grid.isel(y=0, x=0).values, [1.0, 20.0, 10.0])


def test_multi_band_file_needs_a_band(files):
    _, _, stack = files
    with pytest.raises(InputError, match="holds 2 layers .* name one with bio12=.*:BAND"):
        open_climate([ClimateLayer("bio12", stack)])
    with pytest.raises(InputError, match="band 3 does not exist"):
        open_climate([ClimateLayer("bio12", stack, 3)])


def test_layer_on_another_grid_names_both_files_and_the_difference(files):
    folder, a, _ = files
    shifted = _write(folder / "shifted.tif", np.full((3, 4), 2.0), lon0=-149.0)
    with pytest.raises(GridMismatchError, match=r"bio6=.*shifted.tif: origin/transform .* differs from bio5=.*tmax"):
        open_climate([ClimateLayer("bio5", a), ClimateLayer("bio6", shifted)])


def test_layer_faults_carry_their_layer(files):
    # Our own contract: a caller (the study preflight) names the layer by its key from
    # exc.layer and exc.detail, not by parsing the message.
    folder, a, stack = files
    shifted = _write(folder / "shifted2.tif", np.full((3, 4), 2.0), lon0=-149.0)
    cases = [(ClimateLayer("bio12", stack, 3), "band 3 does not exist"),
             (ClimateLayer("bio6", shifted), "origin/transform"),
             (ClimateLayer("bio7", folder / "gone.tif"), "file not found")]
    for layer, detail in cases:
        with pytest.raises(LayerError) as info:
            open_climate([ClimateLayer("bio5", a), layer])
        assert info.value.layer == layer
        assert detail in info.value.detail and not info.value.detail.startswith(str(layer))
        assert str(info.value).startswith(f"{layer}: ")


def test_model_variable_missing_names_both_sides_and_the_fix(files):
    _, _, stack = files
    grid = open_climate(stack)
    with pytest.raises(InputError, match=r"'bio5' needed by the model is missing \(needed: bio5, bio12; "
                                         r"grid has first, second\); name each layer .*--climate bio5=FILE"):
        match_variables(grid, ["bio5", "bio12"], source="future.tif")


def test_layer_table(files):
    folder, a, stack = files
    (folder / "layers.csv").write_text(f"name,path,band\nbio5,{a.name},\nbio12,{stack.name},2\n")
    assert read_layer_table(folder / "layers.csv") == [ClimateLayer("bio5", a), ClimateLayer("bio12", stack, 2)]
    (folder / "dup.csv").write_text(f"name,path\nbio5,{a.name}\nbio5,{a.name}\n")
    with pytest.raises(InputError, match="line 3: layer name 'bio5' appears twice"):
        read_layer_table(folder / "dup.csv")
    (folder / "nopath.csv").write_text("name,file\nbio5,x.tif\n")
    with pytest.raises(InputError, match="column 'path' missing"):
        read_layer_table(folder / "nopath.csv")


def test_scenario_table_with_a_file_per_variable(files):
    folder, a, stack = files
    (folder / "scen.csv").write_text(
        "name,pathway,climate_model,horizon,path,variable,band\n"
        f"s1,p1,mA,2050,{a.name},bio5,\n"
        f"s1,p1,mA,2050,{stack.name},bio12,2\n"
        f"s2,p1,mB,2050,{stack.name},bio5,1\n"
        f"s2,p1,mB,2050,{stack.name},bio12,2\n")
    s1, s2 = read_scenarios(folder / "scen.csv")
    assert s1.climate == [ClimateLayer("bio5", a), ClimateLayer("bio12", stack, 2)]
    grid = open_climate(s2.climate)
    assert grid["variable"].values.tolist() == ["bio5", "bio12"]
    np.testing.assert_array_equal(grid.isel(y=0, x=0).values, [10.0, 20.0])
    (folder / "bad.csv").write_text(
        "name,pathway,climate_model,horizon,path,variable\n"
        f"s1,p1,mA,2050,{a.name},bio5\n"
        f"s1,p1,mA,2080,{a.name},bio12\n")
    with pytest.raises(InputError, match="different pathway, climate model or horizon"):
        read_scenarios(folder / "bad.csv")
