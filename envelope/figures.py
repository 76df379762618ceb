"""Maps and plots of a study as matplotlib Figures (Agg canvas, no pyplot state, no network)."""

from __future__ import annotations

import base64
import io
import math
import sys

import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import ListedColormap, Normalize
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import FuncFormatter, MultipleLocator
import matplotlib.patheffects as path_effects

from envelope import palettes
from envelope.errors import GridMismatchError, InputError
from envelope.kernels.longitude import label_longitude

__all__ = [
    "map_continuous",
    "map_classes",
    "map_agreement",
    "map_mess",
    "map_small_multiples",
    "map_arrival",
    "plot_partition",
    "grid_projection",
    "plot_response_curves",
    "plot_cv_folds",
    "plot_range_sizes",
    "plot_gain_split",
    "plot_mesh_size_by_latitude",
    "plot_species_ranking",
    "figure_to_png_bytes",
    "figure_to_data_uri",
    "add_scale_bar",
    "nice_length",
    "cartopy_ready",
]

#: Largest number of cells drawn per map; bigger grids are thinned by a whole-cell stride
#: for display only (a 110-dpi figure cannot show more than about a million cells anyway).
MAX_DRAWN_CELLS = 2_000_000

_MAP_SIZE = (7.2, 6.0)


# ------------------------------------------------------------------ grid helpers ------

def _check_layer(da, name: str):
    """A (y, x) DataArray with 1-D x and y coordinates, or InputError naming ``name``."""
    dims = getattr(da, "dims", None)
    if dims is None:
        raise InputError(f"{name}: found {type(da).__name__}, expected an xarray.DataArray with dims (y, x)")
    if tuple(dims) != ("y", "x"):
        raise InputError(f"{name}: found dims {tuple(dims)}, expected ('y', 'x')")
    for c in ("x", "y"):
        if c not in da.coords or da.sizes[c] < 2:
            raise InputError(f"{name}: coordinate {c!r} missing or shorter than 2 cells; "
                             "expected cell-centre coordinates")
    return da


def _is_geographic(da) -> bool:
    """True for lon/lat grids: from the attached CRS, else from the coordinate ranges."""
    crs = None
    try:
        crs = da.rio.crs
    except Exception:  # rioxarray missing or no CRS: fall back to the coordinates
        crs = None
    if crs is not None:
        return bool(crs.is_geographic)
    x, y = np.asarray(da["x"]), np.asarray(da["y"])
    # continuous longitudes of a grid over the 180 deg meridian may run past 180
    return bool(np.all(np.abs(y) <= 90.0) and np.all(np.abs(x) <= 540.0) and np.ptp(x) <= 360.0)


def _thin(da):
    """Whole-cell stride so that at most MAX_DRAWN_CELLS are drawn (display only)."""
    step = max(1, math.ceil(math.sqrt(da.sizes["y"] * da.sizes["x"] / MAX_DRAWN_CELLS)))
    return da.isel(y=slice(None, None, step), x=slice(None, None, step)) if step > 1 else da


def _extent(da) -> tuple[float, float, float, float]:
    """(left, right, bottom, top) of the cell edges, from cell-centre coordinates."""
    x, y = np.asarray(da["x"], float), np.asarray(da["y"], float)
    dx, dy = abs(x[1] - x[0]), abs(y[1] - y[0])
    return (x.min() - dx / 2, x.max() + dx / 2, y.min() - dy / 2, y.max() + dy / 2)


def _origin(da) -> str:
    return "upper" if float(da["y"][0]) > float(da["y"][-1]) else "lower"


def _same_grid(ref, other, other_name: str) -> None:
    _check_layer(other, other_name)
    if other.shape != ref.shape:
        raise GridMismatchError(f"{other_name}: found shape {other.shape}, expected {ref.shape} like the mapped layer")
    for c in ("x", "y"):
        if not np.allclose(np.asarray(other[c], float), np.asarray(ref[c], float)):
            raise GridMismatchError(f"{other_name}: {c} coordinates differ from the mapped layer's")


# ------------------------------------------------------------------ cartopy ------------

def cartopy_ready() -> bool:
    """True when cartopy imports (a core dependency; maps fall back to plain axes without it).

    No coastline data is ever read or downloaded: coasts are drawn from the study's own
    land mask.
    """
    try:
        import cartopy.crs  # noqa: F401
    except ImportError:
        return False
    return True


def _over_antimeridian(extent, geographic: bool) -> bool:
    """True when a lon/lat map's columns run across the 180° meridian (x beyond ±180)."""
    return geographic and (extent[0] < -180.0 - 1e-9 or extent[1] > 180.0 + 1e-9)


def _use_cartopy(use_cartopy, over_antimeridian: bool = False) -> bool:
    # A grid over the 180 deg meridian is drawn on plain axes in its own continuous
    # longitudes (labelled -180..180); cartopy's PlateCarree would cut it at the seam.
    if use_cartopy is None:
        return cartopy_ready() and not over_antimeridian
    if use_cartopy and over_antimeridian:
        raise InputError("use_cartopy=True: the grid runs across the 180° meridian, which the cartopy map "
                         "would cut in two; pass use_cartopy=None for a continuous plain map")
    if use_cartopy and not cartopy_ready():
        raise InputError("use_cartopy=True: cartopy is not installed; install envelope's dependencies "
                         "(pip install envelope) or pass use_cartopy=False")
    return bool(use_cartopy)


def grid_projection(da):
    """The cartopy CRS of a layer's grid: PlateCarree for lon/lat, else the grid's own CRS.

    A projected CRS without a published area of use gets the layer's extent as its bounds.
    """
    import cartopy.crs as ccrs

    crs = None
    try:
        crs = da.rio.crs
    except Exception:  # no rioxarray accessor or no CRS: decide from the coordinates
        crs = None
    if crs is None or crs.is_geographic:
        return ccrs.PlateCarree()
    import pyproj

    proj = ccrs.Projection(pyproj.CRS.from_user_input(crs.to_wkt()))
    if proj.bounds is None:
        left, right, bottom, top = _extent(da)
        pad_x, pad_y = (right - left), (top - bottom)
        proj.bounds = (left - pad_x, right + pad_x, bottom - pad_y, top + pad_y)
    return proj


# ------------------------------------------------------------------ map furniture ------

def nice_length(value: float) -> float:
    """The largest 1, 2 or 5 × 10^k not above ``value`` (> 0)."""
    if not value > 0:
        raise InputError(f"scale bar: found a map width of {value} km, expected a positive width")
    k = math.floor(math.log10(value))
    for m in (5.0, 2.0, 1.0):
        if m * 10 ** k <= value * (1 + 1e-12):
            return m * 10 ** k
    return 10.0 ** (k - 1) * 5.0  # pragma: no cover - unreachable (1×10^k <= value)


def _degree_step(span: float) -> float:
    """A graticule step giving about 3-6 lines across ``span`` degrees."""
    for step in (0.01, 0.02, 0.05, 0.1, 0.2, 0.25, 0.5, 1, 2, 2.5, 5, 10, 15, 30, 45, 60):
        if span / step <= 6:
            return step
    return 90.0


def _lon_label(v: float, _pos=None) -> str:
    """Degrees of longitude in −180…180 with E/W, also for axes in continuous longitudes (190 -> 170°W)."""
    v = round(float(label_longitude(round(v, 6))), 6)
    if abs(v) == 180.0:
        return "180°"
    hemi = "W" if v < 0 else ("E" if v > 0 else "")
    return f"{abs(v):g}°{hemi}"


def _lat_label(v: float, _pos=None) -> str:
    v = round(v, 6)
    hemi = "S" if v < 0 else ("N" if v > 0 else "")
    return f"{abs(v):g}°{hemi}"


def _graticule(ax, extent, geographic: bool) -> None:
    """Gridlines with degree labels (geographic) or metre labels (projected)."""
    left, right, bottom, top = extent
    if geographic:
        ax.xaxis.set_major_locator(MultipleLocator(_degree_step(right - left)))
        ax.yaxis.set_major_locator(MultipleLocator(_degree_step(top - bottom)))
        ax.xaxis.set_major_formatter(FuncFormatter(_lon_label))
        ax.yaxis.set_major_formatter(FuncFormatter(_lat_label))
    else:
        ax.set_xlabel("x (m)")
        ax.set_ylabel("y (m)")
    ax.grid(True, color="0.55", linewidth=0.4, linestyle=(0, (2, 2)))
    ax.set_axisbelow(False)
    ax.tick_params(labelsize=8)


def _unit_to_metres(da) -> float:
    try:
        crs = da.rio.crs
        if crs is not None and crs.axis_info:
            return float(crs.axis_info[0].unit_conversion_factor)
    except Exception:
        pass
    return 1.0


def add_scale_bar(ax, *, geographic: bool = True, fraction: float = 0.25,
                  anchor: tuple[float, float] = (0.05, 0.05), unit_to_metres: float = 1.0):
    """Draw a scale bar in km whose length is a true distance where it is drawn.

    On a lon/lat map the bar is laid along the parallel at its own latitude and its
    end longitude is solved so that the geodesic (WGS 84) between its ends equals the
    labelled length, rounded down to 1, 2 or 5 × 10^k km from ``fraction`` of the map
    width. On a projected map the length is taken in the CRS's linear unit.

    Returns
    -------
    (Line2D, Text)
        The bar (gid ``"scale_bar"``) and its label (gid ``"scale_bar_label"``).

    References
    ----------
    Karney, C. F. F. (2013). Algorithms for geodesics. Journal of Geodesy 87, 43-55
    (pyproj.Geod, used for the distances).
    """
    from scipy.optimize import brentq

    (x0, x1), (y0, y1) = ax.get_xlim(), ax.get_ylim()
    xs = x0 + anchor[0] * (x1 - x0)
    yb = y0 + anchor[1] * (y1 - y0)
    if geographic:
        from pyproj import Geod

        geod = Geod(ellps="WGS84")

        def km(x_end):
            return geod.inv(xs, yb, x_end, yb)[2] / 1000.0

        length = nice_length(fraction * geod.inv(x0, yb, x1, yb)[2] / 1000.0)
        xe = brentq(lambda x: km(x) - length, xs, x1, xtol=1e-10)
    else:
        width_km = (x1 - x0) * unit_to_metres / 1000.0
        length = nice_length(fraction * width_km)
        xe = xs + length * 1000.0 / unit_to_metres
    halo = [path_effects.withStroke(linewidth=5, foreground="white")]
    (bar,) = ax.plot([xs, xe], [yb, yb], color="black", linewidth=3, solid_capstyle="butt",
                     zorder=20, gid="scale_bar", path_effects=halo, transform=ax.transData)
    label = ax.text((xs + xe) / 2, yb + 0.02 * (y1 - y0), f"{length:g} km", ha="center",
                    va="bottom", fontsize=8, zorder=21, gid="scale_bar_label",
                    path_effects=[path_effects.withStroke(linewidth=3, foreground="white")],
                    transform=ax.transData)
    return bar, label


def _north_arrow(ax) -> None:
    ax.annotate("N", xy=(0.94, 0.95), xytext=(0.94, 0.83), xycoords="axes fraction",
                ha="center", va="center", fontsize=10, fontweight="bold", gid="north_arrow",
                arrowprops=dict(arrowstyle="-|>", color="black", linewidth=1.2))


def _outline(ax, ref, mask, transform_kw, label="land outline"):
    """Contour of a 0/1 mask at 0.5: the coast of our own land mask (no coastline data offline)."""
    values = np.asarray(mask, dtype=float)
    values = np.where(np.isfinite(values), values > 0, 0.0)
    if values.min() == values.max():
        return None
    return ax.contour(np.asarray(ref["x"]), np.asarray(ref["y"]), values, levels=[0.5],
                      colors="0.15", linewidths=0.7, zorder=10, **transform_kw)


def _map_axes(da, title: str, use_cartopy, north_arrow: bool, figsize=_MAP_SIZE):
    """Figure, axes and keyword arguments for drawing ``da`` in its grid's CRS."""
    fig = Figure(figsize=figsize, layout="constrained")
    FigureCanvasAgg(fig)
    ax, extent, transform_kw, geographic = _add_map_axes(fig, (1, 1, 1), da, title, use_cartopy, north_arrow)
    return fig, ax, extent, transform_kw, geographic


def _add_map_axes(fig, where, da, title: str, use_cartopy, north_arrow: bool, labels=True):
    """One map panel at subplot position ``where``: cartopy axes in the grid's CRS when available."""
    geographic = _is_geographic(da)
    extent = _extent(da)
    if _use_cartopy(use_cartopy, _over_antimeridian(extent, geographic)):
        projection = grid_projection(da)
        ax = fig.add_subplot(*where, projection=projection)
        ax.set_extent(extent, crs=projection)
        gl = ax.gridlines(draw_labels=labels, color="0.55", linewidth=0.4, linestyle=(0, (2, 2)))
        gl.top_labels = gl.right_labels = False
        gl.xlabel_style = gl.ylabel_style = {"size": 8}
        if geographic:
            step_x, step_y = _degree_step(extent[1] - extent[0]), _degree_step(extent[3] - extent[2])
            from matplotlib.ticker import MultipleLocator as _ML

            gl.xlocator, gl.ylocator = _ML(step_x), _ML(step_y)
        transform_kw = {"transform": projection}
    else:
        ax = fig.add_subplot(*where)
        ax.set_xlim(extent[0], extent[1])
        ax.set_ylim(extent[2], extent[3])
        if geographic:
            # equirectangular with its standard parallel at the map's centre: true shape there
            centre = math.radians((extent[2] + extent[3]) / 2)
            ax.set_aspect(1.0 / max(math.cos(centre), 1e-6))
        else:
            ax.set_aspect("equal")
        _graticule(ax, extent, geographic)
        transform_kw = {}
    ax.set_facecolor("#F4F6F8")  # pale sea/no-data background, distinct from every class
    if title:
        ax.set_title(title, fontsize=11 if where == (1, 1, 1) else 9)
    if north_arrow:
        _north_arrow(ax)
    return ax, extent, transform_kw, geographic


def _finish_map(ax, da, extent, geographic, land_mask, transform_kw):
    mask = land_mask if land_mask is not None else np.isfinite(np.asarray(da, dtype=float))
    _outline(ax, da, mask, transform_kw)
    _set_extent(ax, extent)
    add_scale_bar(ax, geographic=geographic, unit_to_metres=_unit_to_metres(da))


def _lonlat_transform(transform_kw) -> dict:
    """Keyword arguments to draw lon/lat lines (GeoJSON fronts) on a map drawn with ``transform_kw``."""
    if not transform_kw:
        return {}
    import cartopy.crs as ccrs

    return {"transform": ccrs.PlateCarree()}


def _set_extent(ax, extent):
    if hasattr(ax, "projection"):
        ax.set_extent(extent, crs=ax.projection)
    else:
        ax.set_xlim(extent[0], extent[1])
        ax.set_ylim(extent[2], extent[3])


# ------------------------------------------------------------------ maps ---------------

def map_continuous(da, *, title: str = "", cmap=None, vmin: float | None = None,
                   vmax: float | None = None, label: str = "", land_mask=None,
                   threshold_contour: float | None = None, north_arrow: bool = False,
                   use_cartopy: bool | None = None) -> Figure:
    """Map a continuous layer (suitability, probability...) with a colour bar.

    Parameters
    ----------
    da : xarray.DataArray (y, x)
        Cell-centre x/y coordinates (lon/lat on geographic grids); NaN cells are not drawn.
    title, label : str
        Map title and colour-bar label.
    cmap : matplotlib colormap or name, optional
        Default :func:`envelope.palettes.suitability_cmap`.
    vmin, vmax : float, optional
        Colour limits; default the layer's finite minimum and maximum.
    land_mask : DataArray (y, x), optional
        1 land / 0 sea on the same grid; its outline is drawn. Default: outline of the
        layer's finite cells.
    threshold_contour : float, optional
        Draw a dashed contour at this value (e.g. the presence threshold), listed in a legend.
    north_arrow : bool, default=False
    use_cartopy : bool or None, default=None
        None: draw with cartopy in the grid's CRS when it imports (coasts from the land
        mask, labelled graticule); False: plain matplotlib axes.

    Returns
    -------
    matplotlib.figure.Figure
    """
    _check_layer(da, "map_continuous: da")
    if land_mask is not None:
        _same_grid(da, land_mask, "land_mask")
    da = _thin(da)
    land = _thin(land_mask) if land_mask is not None else None
    values = np.asarray(da, dtype=float)
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        raise InputError(f"map_continuous: {da.name or 'layer'} has no finite cells to map")
    vmin = float(finite.min()) if vmin is None else float(vmin)
    vmax = float(finite.max()) if vmax is None else float(vmax)
    if vmax <= vmin:
        vmax = vmin + 1.0
    cmap = palettes.suitability_cmap() if cmap is None else cmap
    fig, ax, extent, tkw, geographic = _map_axes(da, title, use_cartopy, north_arrow)
    im = ax.imshow(values, extent=extent, origin=_origin(da), cmap=cmap,
                   norm=Normalize(vmin, vmax), interpolation="nearest", zorder=2, **tkw)
    fig.colorbar(im, ax=ax, shrink=0.85, label=label)
    if threshold_contour is not None:
        ax.contour(np.asarray(da["x"]), np.asarray(da["y"]), np.where(np.isfinite(values), values, vmin),
                   levels=[float(threshold_contour)], colors="black", linewidths=1.0,
                   linestyles="--", zorder=11, **tkw)
        ax.legend(handles=[Line2D([], [], color="black", linestyle="--",
                                  label=f"threshold {threshold_contour:g}")],
                  loc="upper left", fontsize=8, framealpha=0.9)
    _finish_map(ax, da, extent, geographic, land, tkw)
    return fig


def _class_colours(categories: dict, colours) -> list:
    """One colour per category (sorted by code): given by code or name, else our palette."""
    colours = dict(colours or {})
    spare = [c for c in palettes.OKABE_ITO.values() if c not in palettes.CLASS_COLOURS.values()]
    spare += list(palettes.OKABE_ITO.values())
    out = []
    for code in sorted(categories):
        name = categories[code]
        if code in colours:
            out.append(colours[code])
        elif name in colours:
            out.append(colours[name])
        elif name in palettes.CLASS_COLOURS:
            out.append(palettes.CLASS_COLOURS[name])
        else:
            out.append(spare.pop(0) if spare else "0.5")
    return out


def map_classes(da, categories: dict[int, str], *, title: str = "", colours=None,
                land_mask=None, front_lines=None, arrival=None, north_arrow: bool = False,
                use_cartopy: bool | None = None) -> Figure:
    """Map a class layer (change classes, reach classes...) with one legend entry per class.

    Parameters
    ----------
    da : xarray.DataArray (y, x)
        Integer class codes (NaN / codes not in ``categories`` are errors, NaN is not drawn).
    categories : dict[int, str]
        Code -> class name; the legend lists the names in code order.
    colours : dict, optional
        Colour by code or by name; default :data:`envelope.palettes.CLASS_COLOURS` by name,
        then unused Okabe & Ito colours.
    land_mask : DataArray (y, x), optional
    front_lines : list of (year, list of (n, 2) arrays of lon, lat), optional
        Spread fronts, one colour per year on a sequential ramp (early dark, late pale),
        listed by year in the legend.
    arrival : DataArray (y, x), optional
        First arrival year per cell (NaN = never); drawn as labelled contours of year.

    Returns
    -------
    matplotlib.figure.Figure
    """
    _check_layer(da, "map_classes: da")
    if not categories:
        raise InputError("map_classes: categories is empty; expected {code: class name}")
    for other, name in ((land_mask, "land_mask"), (arrival, "arrival")):
        if other is not None:
            _same_grid(da, other, name)
    da = _thin(da)
    values = np.asarray(da, dtype=float)
    codes = sorted(int(c) for c in categories)
    present = np.unique(values[np.isfinite(values)]).astype(int)
    unknown = sorted(set(present.tolist()) - set(codes))
    if unknown:
        raise InputError(f"map_classes: found class codes {unknown} not in categories "
                         f"{ {c: categories[c] for c in codes} }")
    index = np.full(values.shape, np.nan)
    for i, code in enumerate(codes):
        index[values == code] = i
    cmap = ListedColormap(_class_colours({c: categories[c] for c in codes}, colours)).with_extremes(
        bad=(0, 0, 0, 0))
    fig, ax, extent, tkw, geographic = _map_axes(da, title, use_cartopy, north_arrow)
    ax.imshow(np.ma.masked_invalid(index), extent=extent, origin=_origin(da), cmap=cmap,
              vmin=-0.5, vmax=len(codes) - 0.5, interpolation="nearest", zorder=2, **tkw)
    handles = [Patch(facecolor=cmap(i), edgecolor="0.3", linewidth=0.5, label=categories[c])
               for i, c in enumerate(codes)]
    if front_lines:
        ramp = palettes.year_colours(len(front_lines))
        for k, (year, lines) in enumerate(sorted(front_lines, key=lambda t: float(t[0]))):
            for line in lines:
                xy = np.asarray(line, dtype=float)
                if xy.ndim != 2 or xy.shape[1] != 2:
                    raise InputError(f"front_lines: year {year}: found an array of shape {xy.shape}, "
                                     "expected (n, 2) lon, lat")
                ax.plot(xy[:, 0], xy[:, 1], color=ramp[k], linewidth=1.3, zorder=12,
                        path_effects=[path_effects.withStroke(linewidth=2.4, foreground="white")],
                        **_lonlat_transform(tkw))
            handles.append(Line2D([], [], color=ramp[k], linewidth=2.0, label=f"front {year:g}"))
    if arrival is not None:
        arr = np.asarray(_thin(arrival), dtype=float)
        years = np.unique(arr[np.isfinite(arr)])
        if years.size >= 2:
            levels = np.unique(np.quantile(years, np.linspace(0, 1, min(6, years.size))))[1:]
            cs = ax.contour(np.asarray(da["x"]), np.asarray(da["y"]),
                            np.where(np.isfinite(arr), arr, years.max() + 1), levels=levels,
                            colors="0.1", linewidths=0.6, linestyles=":", zorder=12, **tkw)
            ax.clabel(cs, fmt="%d", fontsize=7)
            handles.append(Line2D([], [], color="0.1", linestyle=":", label="arrival year"))
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.02, 1.0), fontsize=8,
              frameon=False, borderaxespad=0.0)
    _finish_map(ax, da, extent, geographic,
                _thin(land_mask) if land_mask is not None else None, tkw)
    return fig


def map_agreement(count_da, n_models: int, *, title: str = "Model agreement",
                  land_mask=None, north_arrow: bool = False,
                  use_cartopy: bool | None = None) -> Figure:
    """Map how many of ``n_models`` ensemble members call each cell suitable (0..n)."""
    n_models = int(n_models)
    if n_models < 1:
        raise InputError(f"map_agreement: n_models found {n_models}, expected at least 1")
    _check_layer(count_da, "map_agreement: count_da")
    values = np.asarray(count_da, dtype=float)
    finite = values[np.isfinite(values)]
    if finite.size and (finite.min() < 0 or finite.max() > n_models or np.any(finite != np.round(finite))):
        raise InputError(f"map_agreement: counts found in {finite.min():g}..{finite.max():g}, "
                         f"expected whole numbers 0..{n_models}")
    categories = {k: f"{k} of {n_models}" for k in range(n_models + 1)}
    colours = dict(zip(range(n_models + 1), palettes.agreement_colours(n_models)))
    return map_classes(count_da, categories, title=title, colours=colours, land_mask=land_mask,
                       north_arrow=north_arrow, use_cartopy=use_cartopy)


def map_mess(mess_da, *, title: str = "Novel climate (MESS)", land_mask=None,
             limit: float | None = None, north_arrow: bool = False,
             use_cartopy: bool | None = None) -> Figure:
    """Map the multivariate environmental similarity surface; negative = novel climate.

    Colours are symmetric about 0 (``limit`` default: 98th percentile of |MESS|), the
    zero contour is drawn, and the share of the land area (true cell areas) in novel
    climate is printed on the map.

    References
    ----------
    Elith, J., Kearney, M. & Phillips, S. (2010). The art of modelling range-shifting
    species. Methods in Ecology and Evolution 1, 330-342. doi:10.1111/j.2041-210X.2010.00036.x
    """
    _check_layer(mess_da, "map_mess: mess_da")
    values = np.asarray(mess_da, dtype=float)
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        raise InputError("map_mess: mess_da has no finite cells to map")
    if limit is None:
        limit = float(np.nanpercentile(np.abs(finite), 98)) or 1.0
    fig = map_continuous(mess_da, title=title, cmap=palettes.change_cmap(), vmin=-limit,
                         vmax=limit, label="MESS (negative = outside the reference climate)",
                         land_mask=land_mask, north_arrow=north_arrow, use_cartopy=use_cartopy)
    ax = fig.axes[0]
    shown = _thin(mess_da)
    vals = np.asarray(shown, dtype=float)
    if np.nanmin(vals) < 0 < np.nanmax(vals):
        ax.contour(np.asarray(shown["x"]), np.asarray(shown["y"]), np.where(np.isfinite(vals), vals, 1.0),
                   levels=[0.0], colors="black", linewidths=0.8, zorder=11,
                   **({"transform": ax.projection} if hasattr(ax, "projection") else {}))
    # the share of the land AREA (true cell areas), the unit of the suitability table's novel_share
    from envelope.grids import cell_area_km2

    try:
        area = np.asarray(cell_area_km2(mess_da).values, dtype=float)
    except Exception:  # no CRS and coordinates that are not lon/lat: equal cells
        area = np.ones(values.shape)
    ok = np.isfinite(values) & np.isfinite(area)
    novel = 100.0 * float(area[ok & (values < 0)].sum() / area[ok].sum())
    ax.text(0.98, 0.02, f"novel: {novel:.1f}% of the land area", transform=ax.transAxes, ha="right",
            va="bottom", fontsize=8, gid="novel_share",
            bbox=dict(facecolor="white", edgecolor="0.4", linewidth=0.5))
    return fig


def map_small_multiples(layers: dict, *, categories: dict | None = None, colours=None, cmap=None,
                        vmin: float | None = None, vmax: float | None = None, label: str = "", land_mask=None,
                        ncols: int = 3, title: str = "", zero_contour: bool = False,
                        use_cartopy: bool | None = None) -> Figure:
    """One small map per layer (e.g. per climate model), on shared colours and one legend or colour bar.

    Parameters
    ----------
    layers : dict[str, DataArray (y, x)]
        Panel title -> layer, all on one grid.
    categories : dict[int, str], optional
        Class layers: code -> class name (one shared legend). Otherwise the layers are
        continuous and share ``cmap``, ``vmin``/``vmax`` (default the finite range of all)
        and one colour bar labelled ``label``.
    zero_contour : bool
        Draw the 0 contour of each continuous layer (e.g. MESS).
    """
    if not layers:
        raise InputError("map_small_multiples: layers is empty; expected {title: layer}")
    first = next(iter(layers.values()))
    for name, da in layers.items():
        _check_layer(da, f"map_small_multiples: {name}")
        _same_grid(first, da, f"map_small_multiples: {name}")
    n = len(layers)
    ncols = max(1, min(ncols, n))
    nrows = math.ceil(n / ncols)
    fig = Figure(figsize=(3.3 * ncols + 1.6, 3.1 * nrows + 0.6), layout="constrained")
    FigureCanvasAgg(fig)
    land = _thin(land_mask) if land_mask is not None else None
    if categories is not None:
        codes = sorted(int(c) for c in categories)
        cmap_ = ListedColormap(_class_colours({c: categories[c] for c in codes}, colours)).with_extremes(
            bad=(0, 0, 0, 0))
        norm = Normalize(-0.5, len(codes) - 0.5)
    else:
        finite = np.concatenate([np.asarray(v, dtype=float)[np.isfinite(np.asarray(v, dtype=float))]
                                 for v in layers.values()])
        if finite.size == 0:
            raise InputError("map_small_multiples: the layers have no finite cells to map")
        lo = float(finite.min()) if vmin is None else float(vmin)
        hi = float(finite.max()) if vmax is None else float(vmax)
        cmap_ = palettes.suitability_cmap() if cmap is None else cmap
        norm = Normalize(lo, hi if hi > lo else lo + 1.0)
    im = None
    for i, (name, da) in enumerate(layers.items()):
        da = _thin(da)
        ax, extent, tkw, geographic = _add_map_axes(fig, (nrows, ncols, i + 1), da, name, use_cartopy, False,
                                                    labels=True)
        values = np.asarray(da, dtype=float)
        if categories is not None:
            index = np.full(values.shape, np.nan)
            for k, code in enumerate(codes):
                index[values == code] = k
            values = np.ma.masked_invalid(index)
        im = ax.imshow(values, extent=extent, origin=_origin(da), cmap=cmap_, norm=norm,
                       interpolation="nearest", zorder=2, **tkw)
        if zero_contour and categories is None:
            v = np.asarray(da, dtype=float)
            if np.nanmin(v) < 0 < np.nanmax(v):
                ax.contour(np.asarray(da["x"]), np.asarray(da["y"]), np.where(np.isfinite(v), v, 1.0),
                           levels=[0.0], colors="black", linewidths=0.6, zorder=11, **tkw)
        _outline(ax, da, land if land is not None else np.isfinite(np.asarray(da, dtype=float)), tkw)
        _set_extent(ax, extent)
    if categories is not None:
        handles = [Patch(facecolor=cmap_(k), edgecolor="0.3", linewidth=0.5, label=categories[c])
                   for k, c in enumerate(codes)]
        fig.legend(handles=handles, loc="outside lower center", ncol=min(len(codes), 6), fontsize=8, frameon=False)
    else:
        fig.colorbar(im, ax=fig.axes, shrink=0.8, label=label)
    if title:
        fig.suptitle(title, fontsize=11)
    return fig


def map_arrival(arrival, *, title: str = "Arrival year", land_mask=None,
                use_cartopy: bool | None = None) -> Figure:
    """Map the first year each cell is occupied (NaN = never, not drawn), early dark to late pale."""
    _check_layer(arrival, "map_arrival: arrival")
    values = np.asarray(arrival, dtype=float)
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        raise InputError("map_arrival: no cell is ever reached; nothing to map")
    return map_continuous(arrival, title=title, cmap=palettes.year_cmap(), vmin=float(finite.min()),
                          vmax=float(max(finite.max(), finite.min() + 1)),
                          label="first year occupied (occupancy >= 0.5)", land_mask=land_mask,
                          use_cartopy=use_cartopy)


def plot_partition(table, *, title: str = "Where the spread between runs comes from") -> Figure:
    """Horizontal bars: the share of variance of each quantity due to each source.

    Parameters
    ----------
    table : DataFrame with columns quantity, source, share (``uncertainty_partition.csv``)
    """
    _require_columns(table, ["quantity", "source", "share"], "plot_partition: table")
    quantities = list(dict.fromkeys(table["quantity"]))
    fig = _plot_figure((7.5, 0.32 * len(table) + 0.9 * len(quantities) + 0.8))
    axes = fig.subplots(len(quantities), 1, squeeze=False, sharex=True).ravel()
    for ax, q in zip(axes, quantities):
        rows = table[table["quantity"] == q]
        pos = np.arange(len(rows))
        ax.barh(pos, 100 * rows["share"].to_numpy(dtype=float), color=palettes.OKABE_ITO["blue"],
                edgecolor="0.2", linewidth=0.5)
        ax.set_yticks(pos, [str(s).replace(":", " × ").replace("_", " ") for s in rows["source"]], fontsize=8)
        ax.invert_yaxis()
        ax.set_title(str(q).replace("_km2", " (km²)").replace("_", " "), fontsize=10, loc="left")
        ax.grid(True, axis="x", color="0.85", linewidth=0.5)
        ax.set_axisbelow(True)
    axes[-1].set_xlabel("share of variance across runs (%)")
    axes[-1].set_xlim(0, 100)
    fig.suptitle(title, fontsize=11)
    return fig


# ------------------------------------------------------------------ plots --------------

def _require_columns(df, columns, what: str):
    if not isinstance(df, pd.DataFrame):
        raise InputError(f"{what}: found {type(df).__name__}, expected a pandas DataFrame "
                         f"with columns {', '.join(columns)}")
    missing = [c for c in columns if c not in df.columns]
    if missing:
        raise InputError(f"{what}: missing column(s) {missing}; found {list(df.columns)}, "
                         f"expected {', '.join(columns)}")
    if df.empty:
        raise InputError(f"{what}: the table has no rows")
    return df


def _plot_figure(figsize):
    fig = Figure(figsize=figsize, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def plot_response_curves(curves: dict, units: dict | None = None, *,
                         title: str = "Response curves") -> Figure:
    """One small panel per variable: modelled suitability against the variable.

    Parameters
    ----------
    curves : dict[str, (x array, y array)]
    units : dict[str, str], optional
        Units shown in each axis label.
    """
    if not curves:
        raise InputError("plot_response_curves: curves is empty; expected {variable: (x, y)}")
    units = units or {}
    n = len(curves)
    ncols = min(3, n)
    nrows = math.ceil(n / ncols)
    fig = _plot_figure((3.0 * ncols + 0.4, 2.5 * nrows + 0.5))
    axes = fig.subplots(nrows, ncols, squeeze=False, sharey=True)
    top = 0.0
    for i, (var, xy) in enumerate(curves.items()):
        try:
            x, y = (np.asarray(v, dtype=float) for v in xy)
        except (TypeError, ValueError) as err:
            raise InputError(f"plot_response_curves: {var!r}: expected a pair of numeric arrays (x, y)") from err
        if x.shape != y.shape or x.ndim != 1:
            raise InputError(f"plot_response_curves: {var!r}: x has shape {x.shape} and y {y.shape}, "
                             "expected two 1-D arrays of the same length")
        ax = axes[i // ncols][i % ncols]
        ax.plot(x, y, color=palettes.OKABE_ITO["blue"], linewidth=1.6, label=var)
        ax.fill_between(x, 0, y, color=palettes.OKABE_ITO["blue"], alpha=0.12, linewidth=0)
        unit = units.get(var, "")
        ax.set_xlabel(f"{var} ({unit})" if unit else var, fontsize=9)
        if i % ncols == 0:
            ax.set_ylabel("suitability", fontsize=9)
        top = max(top, float(np.nanmax(y)) if y.size else 0.0)
        ax.grid(True, color="0.85", linewidth=0.5)
        ax.tick_params(labelsize=8)
    # shared y axis: one limit for all panels, set once (per-panel limits would freeze it)
    axes[0][0].set_ylim(0, max(top, 1e-3) * 1.05)
    for j in range(n, nrows * ncols):
        axes[j // ncols][j % ncols].set_visible(False)
    fig.suptitle(title, fontsize=11)
    return fig


# Reference levels drawn on each skill panel (what a model without skill would score).
_FOLD_METRICS = {
    # AUC 0.5 = no better than random ranking (Hanley & McNeil 1982)
    "auc": ("AUC", 0.5, "random"),
    # TSS 0 = no skill (Allouche, Tsoar & Kadmon 2006)
    "tss": ("TSS", 0.0, "no skill"),
    # Continuous Boyce index 0 = no better than random (Hirzel et al. 2006)
    "boyce": ("Boyce index", 0.0, "random"),
    # At the 10th-percentile training-presence threshold, 10% omission is expected
    "omission_p10": ("omission at p10", 0.1, "expected"),
}


def plot_cv_folds(per_fold, *, title: str = "Skill per cross-validation fold") -> Figure:
    """Bars of AUC, TSS, Boyce index and p10 omission for each spatial fold, with the mean.

    Parameters
    ----------
    per_fold : DataFrame with columns fold, auc, tss, boyce, omission_p10
    """
    _require_columns(per_fold, ["fold", *_FOLD_METRICS], "plot_cv_folds: per_fold")
    fig = _plot_figure((9.0, 5.4))
    axes = fig.subplots(2, 2, squeeze=False).ravel()
    folds = per_fold["fold"].astype(str).tolist()
    pos = np.arange(len(folds))
    for ax, (col, (name, ref, ref_label)) in zip(axes, _FOLD_METRICS.items()):
        vals = pd.to_numeric(per_fold[col], errors="coerce").to_numpy(dtype=float)
        ax.bar(pos, np.nan_to_num(vals), color=palettes.OKABE_ITO["sky_blue"], edgecolor="0.2",
               linewidth=0.6, label=name)
        for p, v in zip(pos, vals):
            if not np.isfinite(v):
                ax.text(p, 0, "n/a", ha="center", va="bottom", fontsize=7)
        if np.isfinite(vals).any():
            mean = float(np.nanmean(vals))
            ax.axhline(mean, color="black", linewidth=1.0, label=f"mean {mean:.2f}")
        ax.axhline(ref, color="0.3", linewidth=0.9, linestyle=":", label=f"{ref_label} {ref:g}")
        ax.set_xticks(pos, folds, fontsize=8)
        ax.set_xlabel("fold", fontsize=9)
        ax.set_title(name, fontsize=10)
        top = max(np.nanmax(np.append(vals, ref)), 1e-9) if np.isfinite(vals).any() else max(ref, 1.0)
        ax.set_ylim(min(0.0, float(np.nanmin(np.append(vals, 0.0)))), 1.4 * top)  # room for the legend
        ax.legend(fontsize=7, loc="upper right", ncol=3, framealpha=0.9)
        ax.tick_params(labelsize=8)
    fig.suptitle(title, fontsize=11)
    return fig


def plot_range_sizes(table, *, title: str = "Suitable range by pathway and horizon") -> Figure:
    """Future suitable range per pathway and horizon: every climate model, median and spread.

    Parameters
    ----------
    table : DataFrame with columns pathway, horizon, climate_model, range_km2_future,
        range_km2_now
    """
    cols = ["pathway", "horizon", "climate_model", "range_km2_future", "range_km2_now"]
    _require_columns(table, cols, "plot_range_sizes: table")
    fig = _plot_figure((7.5, 4.6))
    ax = fig.subplots()
    horizons = sorted(table["horizon"].unique(), key=lambda h: (str(type(h)), h))
    pathways = list(dict.fromkeys(table["pathway"]))
    models = list(dict.fromkeys(table["climate_model"]))
    markers = ["o", "s", "^", "D", "v", "P", "X", "*"]
    colours = [palettes.OKABE_ITO[k] for k in ("blue", "vermillion", "bluish_green", "orange",
                                                "reddish_purple", "sky_blue")]
    width = 0.6 / max(len(pathways), 1)
    for i, pathway in enumerate(pathways):
        colour = colours[i % len(colours)]
        xs, medians = [], []
        for j, horizon in enumerate(horizons):
            rows = table[(table["pathway"] == pathway) & (table["horizon"] == horizon)]
            if rows.empty:
                continue
            x = j + (i - (len(pathways) - 1) / 2) * width
            vals = rows["range_km2_future"].to_numpy(dtype=float)
            ax.vlines(x, np.nanmin(vals), np.nanmax(vals), color=colour, linewidth=1.2)
            for model, v in zip(rows["climate_model"], vals):
                ax.scatter([x], [v], marker=markers[models.index(model) % len(markers)],
                           facecolor="white", edgecolor=colour, s=22, zorder=3)
            xs.append(x)
            medians.append(float(np.nanmedian(vals)))
        ax.plot(xs, medians, color=colour, marker="_", markersize=16, markeredgewidth=2.5,
                linewidth=1.4, label=f"{pathway} (median, model range)", zorder=4)
    now = table["range_km2_now"].to_numpy(dtype=float)
    ax.axhline(float(np.nanmedian(now)), color="black", linestyle="--", linewidth=1.0,
               label="now")
    for model in models:
        ax.scatter([], [], marker=markers[models.index(model) % len(markers)], facecolor="white",
                   edgecolor="0.2", label=str(model))
    ax.set_xticks(range(len(horizons)), [str(h) for h in horizons])
    ax.set_xlabel("horizon")
    ax.set_ylabel("suitable range (km²)")
    ax.set_ylim(bottom=0)
    ax.grid(True, axis="y", color="0.85", linewidth=0.5)
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    ax.set_title(title, fontsize=11)
    return fig


_GAIN_PARTS = [
    ("gained_reached", "gained, reached", ""),
    ("gained_unreached", "gained, not reached", "//"),
    ("gained_no_habitat", "gained, no habitat", ".."),
]


def plot_gain_split(table, *, title: str = "What becomes of the climatic gain") -> Figure:
    """Stacked bars per scenario: gained area reached, not reached in time, without habitat.

    Parameters
    ----------
    table : DataFrame with columns scenario, gained_reached, gained_unreached,
        gained_no_habitat (km²)
    """
    _require_columns(table, ["scenario", *(c for c, _, _ in _GAIN_PARTS)], "plot_gain_split: table")
    fig = _plot_figure((7.5, 0.45 * len(table) + 1.8))
    ax = fig.subplots()
    pos = np.arange(len(table))
    left = np.zeros(len(table))
    for col, label, hatch in _GAIN_PARTS:
        vals = pd.to_numeric(table[col], errors="coerce").fillna(0).to_numpy(dtype=float)
        if np.any(vals < 0):
            raise InputError(f"plot_gain_split: column {col!r} has negative areas; expected km² >= 0")
        ax.barh(pos, vals, left=left, color=palettes.REACH_CLASS_COLOURS[col], hatch=hatch,
                edgecolor="0.2", linewidth=0.5, label=label)
        left += vals
    ax.set_yticks(pos, table["scenario"].astype(str).tolist(), fontsize=8)
    ax.invert_yaxis()
    ax.set_xlabel("area (km²)")
    ax.grid(True, axis="x", color="0.85", linewidth=0.5)
    ax.set_axisbelow(True)
    ax.legend(fontsize=8, loc="lower right", framealpha=0.9)
    ax.set_title(title, fontsize=11)
    return fig


_RANKING_COLOURS = ("blue", "vermillion", "bluish_green", "orange", "reddish_purple", "sky_blue", "yellow")
_RANKING_MARKERS = ("o", "s", "D", "^", "v", "P", "X")


def plot_species_ranking(table, pathways, *, title: str = "Share of the climatic gain out of reach") -> Figure:
    """Species ranked top to bottom: per pathway, the share of the gain out of reach with its interval.

    Parameters
    ----------
    table : DataFrame with columns species and, per pathway P, ``P`` (share 0-1), ``P.low`` and
        ``P.high`` (its interval; NaN draws no bar), in the order to draw (first row at the top),
        as from :func:`envelope.study.summary.out_of_reach`
    pathways : the pathways to draw, one colour and marker each (colour-blind-safe palette)
    """
    pathways = list(pathways)
    _require_columns(table, ["species", *pathways, *(f"{p}.{e}" for p in pathways for e in ("low", "high"))],
                     "plot_species_ranking: table")
    n, k = len(table), max(len(pathways), 1)
    fig = _plot_figure((7.5, 0.42 * n + 1.6))
    ax = fig.subplots()
    pos = np.arange(n, dtype=float)
    for i, p in enumerate(pathways):
        y = pos + (i - (k - 1) / 2) * min(0.6 / k, 0.25)
        colour = palettes.OKABE_ITO[_RANKING_COLOURS[i % len(_RANKING_COLOURS)]]
        mid = pd.to_numeric(table[p], errors="coerce").to_numpy(float) * 100
        lo = pd.to_numeric(table[f"{p}.low"], errors="coerce").to_numpy(float) * 100
        hi = pd.to_numeric(table[f"{p}.high"], errors="coerce").to_numpy(float) * 100
        bars = np.isfinite(lo) & np.isfinite(hi)
        ax.hlines(y[bars], lo[bars], hi[bars], color=colour, linewidth=2, alpha=0.7)
        ax.plot(mid, y, linestyle="none", marker=_RANKING_MARKERS[i % len(_RANKING_MARKERS)], color=colour,
                markeredgecolor="0.2", markeredgewidth=0.5, label=f"pathway {p}")
    ax.set_yticks(pos, table["species"].astype(str).tolist(), fontsize=8, fontstyle="italic")
    ax.invert_yaxis()
    ax.set_xlim(0, 100)
    ax.set_xlabel("climatic gain out of reach (%)")
    ax.grid(True, axis="x", color="0.85", linewidth=0.5)
    ax.set_axisbelow(True)
    if pathways:
        ax.legend(fontsize=8, loc="lower right", framealpha=0.9)
    ax.set_title(title, fontsize=11)
    return fig


def plot_mesh_size_by_latitude(bands, *, title: str = "Habitat fragmentation by latitude") -> Figure:
    """Effective mesh size and habitat share per latitude band, equator at the bottom, pole at the top.

    Parameters
    ----------
    bands : DataFrame with columns lat_min, lat_max, hemisphere, effective_mesh_size_km2,
        habitat_share_of_land (rows equatorward to poleward, as from
        :func:`envelope.habitat.fragmentation_by_latitude`)
    """
    cols = ["lat_min", "lat_max", "hemisphere", "effective_mesh_size_km2", "habitat_share_of_land"]
    _require_columns(bands, cols, "plot_mesh_size_by_latitude: bands")
    mesh = pd.to_numeric(bands["effective_mesh_size_km2"], errors="coerce").fillna(0).to_numpy(dtype=float)
    share = pd.to_numeric(bands["habitat_share_of_land"], errors="coerce").fillna(0).to_numpy(dtype=float)
    if np.any(mesh < 0) or np.any(share < 0):
        raise InputError("plot_mesh_size_by_latitude: negative mesh size or habitat share; expected values >= 0")
    fig = _plot_figure((7.5, 0.32 * len(bands) + 1.6))
    ax_mesh, ax_share = fig.subplots(1, 2, sharey=True)
    pos = np.arange(len(bands))
    labels = [f"{abs(a):g}–{abs(b):g}° {h}" for a, b, h in zip(bands["lat_min"], bands["lat_max"],
                                                                 bands["hemisphere"])]
    ax_mesh.barh(pos, mesh, color=palettes.OKABE_ITO["bluish_green"], edgecolor="0.2", linewidth=0.5)
    ax_mesh.set_xlabel("effective mesh size (km²)")
    ax_share.barh(pos, 100 * share, color=palettes.OKABE_ITO["sky_blue"], edgecolor="0.2", linewidth=0.5)
    ax_share.set_xlabel("habitat share of land (%)")
    ax_mesh.set_yticks(pos, labels, fontsize=8)
    for ax in (ax_mesh, ax_share):
        ax.grid(True, axis="x", color="0.85", linewidth=0.5)
        ax.set_axisbelow(True)
        ax.tick_params(labelsize=8)
    fig.suptitle(title + " (poleward at the top)", fontsize=11)
    return fig


# ------------------------------------------------------------------ output -------------

def figure_to_png_bytes(fig: Figure, dpi: int = 110) -> bytes:
    """Render a Figure to PNG bytes (Agg) and close it."""
    if not isinstance(fig, Figure):
        raise InputError(f"figure_to_png_bytes: found {type(fig).__name__}, expected a matplotlib Figure")
    buf = io.BytesIO()
    try:
        fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight", pad_inches=0.08,
                    metadata={"Software": None})
    finally:
        if "matplotlib.pyplot" in sys.modules:  # release a pyplot-managed figure too
            sys.modules["matplotlib.pyplot"].close(fig)
    return buf.getvalue()


def figure_to_data_uri(fig: Figure, dpi: int = 110) -> str:
    """A ``data:image/png;base64,...`` URI of the Figure (for self-contained HTML); closes it."""
    return "data:image/png;base64," + base64.b64encode(figure_to_png_bytes(fig, dpi)).decode("ascii")
