"""Tests of envelope.palettes and envelope.figures: colour science, CVD safety, maps and plots."""

import base64
import io
import itertools
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
import rioxarray
from matplotlib.figure import Figure
from PIL import Image
from pyproj import Geod

from envelope import figures, palettes
from envelope.errors import GridMismatchError, InputError

DEMO = Path(__file__).resolve().parents[1] / "sample_grids" / "demo"
GEOD = Geod(ellps="WGS84")


def _layer(path):
    return rioxarray.open_rasterio(path, masked=True).squeeze("band", drop=True)


@pytest.fixture(scope="module")
def demo():
    if not (DEMO / "true_suitability.tif").is_file():
        pytest.skip(f"demo study not found in {DEMO}")
    return {name: _layer(DEMO / f"{name}.tif") for name in ("true_suitability", "habitat", "landmask")}


def tiny(values, lon0=-150.0, lat0=41.0, res=0.5, crs="EPSG:4326"):
    """A small north-up (y, x) layer with cell-centre coordinates."""
    values = np.asarray(values, dtype="float32")
    ny, nx = values.shape
    x = lon0 + res * (np.arange(nx) + 0.5)
    y = lat0 - res * (np.arange(ny) + 0.5)
    return xr.DataArray(values, dims=("y", "x"), coords={"y": y, "x": x}).rio.write_crs(crs)


def scale_bar(fig):
    ax = fig.axes[0]
    bars = [ln for ln in ax.lines if ln.get_gid() == "scale_bar"]
    labels = [t for t in ax.texts if t.get_gid() == "scale_bar_label"]
    assert len(bars) == 1 and len(labels) == 1
    km = float(re.fullmatch(r"([0-9.]+) km", labels[0].get_text()).group(1))
    return bars[0], km


def legend_texts(fig):
    texts = []
    for ax in fig.axes:
        leg = ax.get_legend()
        if leg is not None:
            texts += [t.get_text() for t in leg.get_texts()]
    return texts


# ----------------------------------------------------------------- colour science ------

def test_lab_matches_published_values():
    # Source: CIE 1976 L*a*b* of sRGB primaries, D65, as tabulated by B. Lindbloom's
    # colour calculator (brucelindbloom.com) — red (53.24, 80.09, 67.20), blue
    # (32.30, 79.19, -107.86); white is L*=100, a*=b*=0 by definition (CIE 15:2004).
    lab = palettes.srgb_to_lab(["#FF0000", "#0000FF", "#FFFFFF", "#000000"])
    np.testing.assert_allclose(lab[0], [53.24, 80.09, 67.20], atol=0.1)
    np.testing.assert_allclose(lab[1], [32.30, 79.19, -107.86], atol=0.2)
    np.testing.assert_allclose(lab[2], [100.0, 0.0, 0.0], atol=0.02)
    np.testing.assert_allclose(lab[3], [0.0, 0.0, 0.0], atol=1e-9)


def test_lab_round_trip():
    # Common practice, no source: an inverse must undo the forward transform in gamut
    rgb = np.random.default_rng(1).uniform(0, 1, size=(200, 3))
    np.testing.assert_allclose(palettes.lab_to_srgb(palettes.srgb_to_lab(rgb)), rgb, atol=1e-6)


def test_cvd_simulation_keeps_greys_and_merges_red_green():
    # Source: Machado et al. 2009 — each severity-1.0 matrix has rows summing to 1, so an
    # achromatic colour is unchanged; red/green is the classic deutan/protan confusion pair.
    greys = np.array([[g, g, g] for g in (0.1, 0.5, 0.9)])
    for kind in palettes.CVD_MATRICES:
        np.testing.assert_allclose(palettes.simulate_cvd(greys, kind), greys, atol=2e-3)
    normal = palettes.delta_e("#D00000", "#00A000")
    for kind in ("deuteranopia", "protanopia"):
        sim = palettes.simulate_cvd(["#D00000", "#00A000"], kind)
        assert palettes.delta_e(sim[0], sim[1]) < 0.5 * normal
    with pytest.raises(InputError, match="deficiency"):
        palettes.simulate_cvd("#000000", "achromatopsia")


@pytest.mark.parametrize("name, classes", [("change", palettes.CHANGE_CLASS_COLOURS),
                                           ("reach", palettes.REACH_CLASS_COLOURS)])
@pytest.mark.parametrize("vision", [None, "deuteranopia", "protanopia", "tritanopia"])
def test_class_colours_distinguishable(name, classes, vision):
    # Source: Machado et al. 2009 simulation; CIE 1976 ΔE*ab. A ΔE above ~10 is an easily
    # seen difference between flat patches (From memory: Mokrzycki & Tatol 2011 scale);
    # we ask for 15.
    colours = list(classes.values())
    seen = colours if vision is None else palettes.simulate_cvd(colours, vision)
    lab = palettes.srgb_to_lab(seen)
    worst = min(np.linalg.norm(a - b) for a, b in itertools.combinations(lab, 2))
    assert worst > 15, f"{name} classes under {vision or 'normal vision'}: min ΔE {worst:.1f}"


@pytest.mark.parametrize("vision", [None, "deuteranopia", "protanopia", "tritanopia"])
def test_agreement_colours_distinguishable(vision):
    # Source: as above (Machado et al. 2009; CIE 1976 ΔE*ab)
    colours = palettes.agreement_colours(4)
    seen = colours if vision is None else palettes.simulate_cvd(colours, vision)
    lab = palettes.srgb_to_lab(seen)
    assert min(np.linalg.norm(a - b) for a, b in itertools.combinations(lab, 2)) > 15
    assert np.all(np.diff(lab[:, 0]) < 0)  # more agreement is darker


@pytest.mark.parametrize("vision", [None, "deuteranopia", "protanopia", "tritanopia"])
def test_suitability_cmap_lightness_even_and_monotone(vision):
    # Source: Crameri et al. 2020 (Nat. Commun. 11:5444): a sequential map must change
    # lightness monotonically; evenness measured as linearity of CIE L* along the map.
    rgb = np.asarray(palettes.suitability_cmap().colors)[:, :3]
    seen = rgb if vision is None else palettes.simulate_cvd(rgb, vision)
    lightness = palettes.srgb_to_lab(seen)[:, 0]
    assert np.all(np.diff(lightness) > 0)
    if vision is None:
        fit = np.polyval(np.polyfit(np.arange(lightness.size), lightness, 1), np.arange(lightness.size))
        assert np.max(np.abs(lightness - fit)) < 1.0
        assert lightness[-1] - lightness[0] > 70


def test_change_cmap_symmetric_lightness():
    # Source: Crameri et al. 2020 — a diverging map's arms match in lightness, light centre
    rgb = np.asarray(palettes.change_cmap().colors)[:, :3]
    lightness = palettes.srgb_to_lab(rgb)[:, 0]
    np.testing.assert_allclose(lightness, lightness[::-1], atol=1.5)
    assert lightness[[0, -1]].max() < lightness[127] - 50
    # negative end warm (b* > 0), positive end cool (b* < 0)
    lab = palettes.srgb_to_lab(rgb[[0, -1]])
    assert lab[0, 2] > 20 and lab[1, 2] < -20


# ----------------------------------------------------------------- furniture -----------

def test_nice_length():
    # Analytic: largest 1/2/5 × 10^k not above the value
    assert [figures.nice_length(v) for v in (0.7, 1.0, 1.9, 2.0, 4.99, 7.0, 99.0, 240.0)] == \
        [0.5, 1.0, 1.0, 2.0, 2.0, 5.0, 50.0, 200.0]
    with pytest.raises(InputError, match="positive"):
        figures.nice_length(0.0)


def _check_scale_bar(fig):
    # Source: pyproj.Geod — the geodesic (WGS 84) between the drawn bar's ends equals the label
    bar, km = scale_bar(fig)
    (x0, x1), (y0, y1) = bar.get_xdata(), bar.get_ydata()
    assert y0 == y1
    true_km = GEOD.inv(x0, y0, x1, y1)[2] / 1000.0
    assert abs(true_km - km) / km < 0.01
    mantissa = km / 10 ** np.floor(np.log10(km))
    assert round(mantissa, 9) in (1.0, 2.0, 5.0)
    return km


# ----------------------------------------------------------------- maps on the demo ----

def test_map_continuous_demo(demo):
    suit, land = demo["true_suitability"], demo["landmask"]
    fig = figures.map_continuous(suit, title="True suitability", cmap=None, vmin=0, vmax=1,
                                 label="suitability", land_mask=land, threshold_contour=0.5,
                                 north_arrow=True)
    assert isinstance(fig, Figure)
    ax = fig.axes[0]
    assert len(ax.images) == 1 and ax.images[0].get_clim() == (0.0, 1.0)
    assert len(fig.axes) == 2 and fig.axes[1].get_ylabel() == "suitability"  # colour bar
    assert legend_texts(fig) == ["threshold 0.5"]
    assert any(c.get_gid() == "north_arrow" for c in ax.texts)
    # land outline + threshold contour
    assert len(ax.collections) >= 2
    km = _check_scale_bar(fig)
    # Source: pyproj.Geod — a quarter of the map's width or less, rounded down to 1/2/5
    width_km = GEOD.inv(-152, 36.5, -142, 36.5)[2] / 1000
    assert width_km / 10 < km <= width_km / 4
    fig.canvas.draw()
    # the graticule is cartopy's, labelled in degrees (Common practice, no source)
    labels = graticule_labels(fig)
    xt = [t for t in labels if t.endswith("W")]
    yt = [t for t in labels if t.endswith("N")]
    assert xt and yt and len(xt) + len(yt) == len(labels)
    assert "150°W" in xt and "40°N" in yt


def test_map_classes_demo(demo):
    suit, land = demo["true_suitability"], demo["landmask"]
    codes = xr.where(suit > 0.6, 2, xr.where(suit > 0.3, 1, 0)).where(land == 1)
    categories = {0: "absent", 1: "lost", 2: "stable", 3: "gained", 4: "gained_novel"}
    fronts = [(2050, [np.array([[-150.0, 40.0], [-146.0, 42.0]])]),
              (2080, [np.array([[-150.0, 41.0], [-145.0, 43.0]]), np.array([[-149, 38], [-148, 39]])])]
    arrival = (2000 + 100 * suit).where(suit > 0.2)
    fig = figures.map_classes(codes, categories, title="Change", land_mask=land,
                              front_lines=fronts, arrival=arrival)
    texts = legend_texts(fig)
    # Source: the categories given — one entry per class, in code order, then the fronts
    assert texts[:5] == list(categories.values())
    assert texts[5:] == ["front 2050", "front 2080", "arrival year"]
    leg = fig.axes[0].get_legend()
    got = [tuple(np.round(h.get_facecolor()[:3], 3)) for h in leg.legend_handles[:5]]
    from matplotlib.colors import to_rgb
    want = [tuple(np.round(to_rgb(palettes.CHANGE_CLASS_COLOURS[n]), 3)) for n in categories.values()]
    assert got == want
    # three front polylines were drawn (plus the scale bar)
    assert len([ln for ln in fig.axes[0].lines if ln.get_gid() != "scale_bar"]) == 3
    _check_scale_bar(fig)


def test_map_agreement_and_mess_demo(demo):
    suit, land = demo["true_suitability"], demo["landmask"]
    count = np.floor(suit * 3.999).where(land == 1)
    fig = figures.map_agreement(count, 3, land_mask=land)
    assert legend_texts(fig) == ["0 of 3", "1 of 3", "2 of 3", "3 of 3"]
    _check_scale_bar(fig)
    mess = (suit - 0.3) * 100
    fig = figures.map_mess(mess, land_mask=land)
    lo, hi = fig.axes[0].images[0].get_clim()
    assert lo == -hi and hi > 0
    share = [t.get_text() for t in fig.axes[0].texts if t.get_gid() == "novel_share"][0]
    # Source: pyproj.Geod.polygon_area_perimeter (Karney 2013) for the true cell areas: the
    # inset is the share of the land AREA with MESS < 0, the unit of the table's novel_share
    lat = np.asarray(mess["y"].values)
    dlon, dlat = abs(float(mess["x"][1] - mess["x"][0])), abs(float(mess["y"][1] - mess["y"][0]))
    row_area = np.array([abs(GEOD.polygon_area_perimeter([0, dlon, dlon, 0], [y - dlat / 2, y - dlat / 2,
                                                                              y + dlat / 2, y + dlat / 2])[0])
                         for y in lat])
    area = np.broadcast_to(row_area[:, None], mess.shape)
    ok = np.isfinite(mess.values)
    want = 100 * area[ok & (mess.values < 0)].sum() / area[ok].sum()
    assert share == f"novel: {want:.1f}% of the land area"


# ----------------------------------------------------------------- tiny synthetic ------

def test_maps_on_tiny_grids():
    vals = np.arange(30, dtype=float).reshape(5, 6) / 29
    vals[0, 0] = np.nan
    da = tiny(vals)
    fig = figures.map_continuous(da, title="t", cmap="gray", vmin=None, vmax=None, label="x")
    assert fig.axes[0].images[0].get_clim() == (pytest.approx(1 / 29), pytest.approx(1.0))
    _check_scale_bar(fig)
    fig = figures.map_classes(tiny(np.tile([0, 1, 2], (4, 2))),
                              {0: "stable", 1: "lost", 2: "gained_no_habitat", 3: "mystery"})
    assert legend_texts(fig) == ["stable", "lost", "gained_no_habitat", "mystery"]
    # the name we do not know gets a spare Okabe & Ito colour, not one of the class colours
    handle = fig.axes[0].get_legend().legend_handles[3]
    from matplotlib.colors import to_hex
    assert to_hex(handle.get_facecolor()).upper() not in {c.upper() for c in palettes.CLASS_COLOURS.values()}


def graticule_labels(fig):
    from cartopy.mpl.gridliner import Gridliner

    gls = [a for a in fig.axes[0].artists if isinstance(a, Gridliner)]
    assert gls, "no labelled graticule"
    return [t.get_text() for t in gls[0].label_artists if t.get_visible() and t.get_text()]


def test_projected_scale_bar():
    # Analytic: on a metre grid the bar's drawn length in metres is the label × 1000
    import pyproj

    da = tiny(np.random.default_rng(0).uniform(size=(8, 10)), lon0=500_000, lat0=4_600_000,
              res=5_000, crs="EPSG:32610")
    fig = figures.map_continuous(da, title="", label="")
    bar, km = scale_bar(fig)
    assert np.diff(bar.get_xdata())[0] == pytest.approx(km * 1000)
    # Source: pyproj.CRS.equals — the map is drawn in the grid's own CRS
    assert pyproj.CRS.from_user_input(fig.axes[0].projection).equals(pyproj.CRS("EPSG:32610"))
    fig.canvas.draw()
    assert graticule_labels(fig)
    plain = figures.map_continuous(da, title="", label="", use_cartopy=False)
    assert plain.axes[0].get_xlabel() == "x (m)"


def test_map_errors():
    da = tiny(np.zeros((4, 5)))
    with pytest.raises(InputError, match=r"dims \('x', 'y'\)"):
        figures.map_continuous(da.transpose("x", "y"))
    with pytest.raises(GridMismatchError, match="land_mask: found shape"):
        figures.map_continuous(da, land_mask=tiny(np.ones((3, 5))))
    with pytest.raises(InputError, match=r"class codes \[7\] not in categories"):
        figures.map_classes(tiny(np.full((4, 5), 7.0)), {0: "absent"})
    with pytest.raises(InputError, match="expected whole numbers 0..2"):
        figures.map_agreement(tiny(np.full((4, 5), 3.0)), 2)
    with pytest.raises(InputError, match="no finite cells"):
        figures.map_continuous(tiny(np.full((4, 5), np.nan)))
    with pytest.raises(InputError, match="front_lines: year 2050"):
        figures.map_classes(tiny(np.zeros((4, 5))), {0: "absent"}, front_lines=[(2050, [np.zeros(3)])])


def test_cartopy_path_when_installed():
    pytest.importorskip("cartopy")
    from cartopy.mpl.geoaxes import GeoAxes
    da = tiny(np.random.default_rng(2).uniform(size=(6, 8)))
    fig = figures.map_continuous(da, title="c", label="s", use_cartopy=True)
    assert isinstance(fig.axes[0], GeoAxes)
    _check_scale_bar(fig)
    assert figures.figure_to_png_bytes(fig)[:8] == b"\x89PNG\r\n\x1a\n"


# ----------------------------------------------------------------- plots ---------------

def test_plot_response_curves():
    x = np.linspace(0, 30, 40)
    fig = figures.plot_response_curves({"bio1": (x, np.exp(-(x - 15) ** 2 / 20)), "bio12": (x, x / 30),
                                        "gdd5": (x, x / 40), "bio17": (x, 1 - x / 30)},
                                       {"bio1": "degC", "bio12": "mm"})
    visible = [ax for ax in fig.axes if ax.get_visible()]
    assert [ax.get_xlabel() for ax in visible] == ["bio1 (degC)", "bio12 (mm)", "gdd5", "bio17"]
    np.testing.assert_allclose(visible[1].lines[0].get_ydata(), x / 30)
    with pytest.raises(InputError, match="'bio1': x has shape"):
        figures.plot_response_curves({"bio1": (x, x[:-1])}, {})
    with pytest.raises(InputError, match="curves is empty"):
        figures.plot_response_curves({}, {})


def test_plot_cv_folds():
    per_fold = pd.DataFrame({"fold": [1, 2, 3], "auc": [0.8, 0.9, 0.7], "tss": [0.5, 0.6, np.nan],
                             "boyce": [0.7, 0.8, 0.9], "omission_p10": [0.1, 0.2, 0.15]})
    fig = figures.plot_cv_folds(per_fold)
    assert [ax.get_title() for ax in fig.axes] == ["AUC", "TSS", "Boyce index", "omission at p10"]
    # Source: pandas mean (NaN skipped) equals the drawn mean line
    texts = legend_texts(fig)
    assert "mean 0.80" in texts and "mean 0.55" in texts and "random 0.5" in texts
    with pytest.raises(InputError, match=r"missing column\(s\) \['boyce'\]"):
        figures.plot_cv_folds(per_fold.drop(columns="boyce"))


def test_plot_range_sizes():
    rows = [dict(pathway=p, horizon=h, climate_model=m, range_km2_now=9000.0,
                 range_km2_future=8000.0 - (h - 2000) * (10 if p == "high" else 5) + 100 * k)
            for p in ("low", "high") for h in (2050, 2080) for k, m in enumerate("abc")]
    table = pd.DataFrame(rows)
    fig = figures.plot_range_sizes(table)
    ax = fig.axes[0]
    medians = {ln.get_label(): ln.get_ydata() for ln in ax.lines if "median" in ln.get_label()}
    # Source: pandas groupby median
    want = table.groupby(["pathway", "horizon"])["range_km2_future"].median()
    np.testing.assert_allclose(medians["high (median, model range)"], want["high"].to_numpy())
    np.testing.assert_allclose(medians["low (median, model range)"], want["low"].to_numpy())
    assert {"now", "a", "b", "c"} <= set(legend_texts(fig))
    with pytest.raises(InputError, match="plot_range_sizes: table: missing column"):
        figures.plot_range_sizes(table.drop(columns="climate_model"))


def test_plot_gain_split():
    table = pd.DataFrame({"scenario": ["low 2050", "high 2080"], "gained_reached": [100.0, 300.0],
                          "gained_unreached": [50.0, 800.0], "gained_no_habitat": [20.0, 100.0]})
    fig = figures.plot_gain_split(table)
    ax = fig.axes[0]
    assert legend_texts(fig) == ["gained, reached", "gained, not reached", "gained, no habitat"]
    # Analytic: the stacked bars end at each scenario's total gain
    ends = {}
    for patch in ax.patches:
        y = round(patch.get_y() + patch.get_height() / 2)
        ends[y] = max(ends.get(y, 0), patch.get_x() + patch.get_width())
    assert sorted(ends.values()) == [170.0, 1200.0]
    bad = table.assign(gained_unreached=[-1.0, 0.0])
    with pytest.raises(InputError, match="negative areas"):
        figures.plot_gain_split(bad)


def test_plot_mesh_size_by_latitude():
    bands = pd.DataFrame({"lat_min": [40.0, 41.0, 42.0], "lat_max": [41.0, 42.0, 43.0], "hemisphere": ["N"] * 3,
                          "effective_mesh_size_km2": [120.0, 30.0, 2.5],
                          "habitat_share_of_land": [0.3, 0.1, 0.02]})
    fig = figures.plot_mesh_size_by_latitude(bands)
    mesh_ax, share_ax = fig.axes
    # Analytic: bar lengths are the table's values (shares in %), equatorward band at the bottom
    np.testing.assert_allclose([p.get_width() for p in mesh_ax.patches], [120.0, 30.0, 2.5])
    np.testing.assert_allclose([p.get_width() for p in share_ax.patches], [30.0, 10.0, 2.0])
    assert [t.get_text() for t in mesh_ax.get_yticklabels()] == ["40–41° N", "41–42° N", "42–43° N"]
    assert mesh_ax.patches[0].get_y() < mesh_ax.patches[2].get_y()
    with pytest.raises(InputError, match=r"missing column\(s\) \['hemisphere'\]"):
        figures.plot_mesh_size_by_latitude(bands.drop(columns="hemisphere"))
    with pytest.raises(InputError, match="negative mesh size"):
        figures.plot_mesh_size_by_latitude(bands.assign(effective_mesh_size_km2=[-1.0, 0.0, 0.0]))


# ----------------------------------------------------------------- output --------------

def test_figure_to_png_and_data_uri():
    fig = figures.plot_gain_split(pd.DataFrame({"scenario": ["s"], "gained_reached": [1.0],
                                                "gained_unreached": [2.0], "gained_no_habitat": [3.0]}))
    raw = figures.figure_to_png_bytes(fig, dpi=50)
    img = Image.open(io.BytesIO(raw))  # Source: PIL decodes the PNG
    img.verify()
    assert img.format == "PNG"
    uri = figures.figure_to_data_uri(figures.plot_gain_split(pd.DataFrame(
        {"scenario": ["s"], "gained_reached": [1.0], "gained_unreached": [2.0], "gained_no_habitat": [3.0]})))
    assert uri.startswith("data:image/png;base64,")
    big = Image.open(io.BytesIO(base64.b64decode(uri.split(",", 1)[1])))
    assert big.width > Image.open(io.BytesIO(raw)).width  # 110 dpi default vs 50
    with pytest.raises(InputError, match="expected a matplotlib Figure"):
        figures.figure_to_png_bytes("not a figure")
