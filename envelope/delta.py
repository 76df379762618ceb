"""Delta (change-factor) method: a climate model's monthly change, interpolated bilinearly, applied to a fine baseline."""

from __future__ import annotations

import numpy as np
import rioxarray  # noqa: F401  (registers the .rio accessor)
import xarray as xr
from scipy.interpolate import RegularGridInterpolator

from envelope.errors import InputError
from envelope.grids import check_same_grid
from envelope.kernels.longitude import continuous_axis, wrap_longitude

__all__ = ["METHODS", "change_factors", "change_factor_kernel", "bilinear_kernel", "interpolate_factors",
           "apply_delta", "delta"]

METHODS = ("additive", "ratio")
DEFAULT_RATIO_FLOOR = 1.0


def change_factor_kernel(historical, future, *, method: str, ratio_floor: float = DEFAULT_RATIO_FLOOR,
                         max_ratio: float | None = None) -> np.ndarray:
    """Per-month change between a model's future and historical climatologies (same grid).

    Parameters
    ----------
    historical, future : ndarray, same shape
    method : {"additive", "ratio"}
        ``additive``: ``future - historical`` (temperature). ``ratio``:
        ``max(future, floor) / max(historical, floor)`` (precipitation): flooring both
        keeps near-dry months from giving huge or undefined ratios, and a month dry in both
        periods gets ratio 1 (no change).
    ratio_floor : float, default=1.0
        Floor in the units of the model files (1 suits mm per month).
    max_ratio : float, optional
        Upper cap on the ratio; default none.

    References
    ----------
    Hay, L.E., Wilby, R.L. & Leavesley, G.H. (2000) A comparison of delta change and
    downscaled GCM scenarios for three mountainous basins in the United States. Journal of
    the American Water Resources Association 36(2): 387-397.
    """
    historical = np.asarray(historical, dtype=float)
    future = np.asarray(future, dtype=float)
    if method == "additive":
        return future - historical
    if method != "ratio":
        raise InputError(f"method {method!r}; expected one of {', '.join(METHODS)}")
    if not ratio_floor > 0:
        raise InputError(f"ratio floor {ratio_floor!r}; expected a number > 0")
    ratio = np.maximum(future, ratio_floor) / np.maximum(historical, ratio_floor)
    if max_ratio is not None:
        ratio = np.minimum(ratio, float(max_ratio))
    return np.where(np.isfinite(historical) & np.isfinite(future), ratio, np.nan)


def _model_axes(field: xr.DataArray):
    """Model grid as ascending 1-D axes and values (y, x, month); longitudes in one continuous run.

    A global longitude axis gets one cyclic column on each side so points between the last
    and the first column (the seam) interpolate across it.
    """
    crs = field.rio.crs
    geographic = crs is None or crs.is_geographic
    y = np.asarray(field["y"].values, dtype=float)
    x = np.asarray(field["x"].values, dtype=float)
    values = np.asarray(field.transpose("y", "x", "month").values, dtype=float)
    if geographic:
        ox, x = continuous_axis(x)   # 0-360, split at 180 deg or over it: one west-to-east run
    else:
        ox = np.argsort(x)
        x = x[ox]
    oy = np.argsort(y)
    y, values = y[oy], values[oy][:, ox]
    if len(x) < 2 or len(y) < 2:
        raise InputError(f"model grid has {len(y)} x {len(x)} cells; expected at least 2 x 2 for bilinear interpolation")
    west = float(x[0] - 0.5 * (x[1] - x[0]))
    dx = np.diff(x)
    periodic = geographic and np.allclose(dx, dx[0], rtol=1e-6) and abs(len(x) * dx[0] - 360.0) < 1e-6 * 360
    if periodic:
        x = np.concatenate([[x[-1] - 360.0], x, [x[0] + 360.0]])
        values = np.concatenate([values[:, -1:], values, values[:, :1]], axis=1)
    # edges: half a cell beyond the outermost centres
    edges = (y[0] - (y[1] - y[0]) / 2.0, y[-1] + (y[-1] - y[-2]) / 2.0,
             x[0] - (x[1] - x[0]) / 2.0, x[-1] + (x[-1] - x[-2]) / 2.0)
    return y, x, values, geographic, edges, west


def bilinear_kernel(y_axis, x_axis, values, py, px, edges) -> np.ndarray:
    """Bilinear interpolation of ``values`` (ny, nx, k) at points (py, px) -> (..., k).

    Points in the outer half cell (between the last centre and the grid edge) take the edge
    value (constant extrapolation); points beyond the edges are NaN.
    """
    py = np.asarray(py, dtype=float)
    px = np.asarray(px, dtype=float)
    inside = (py >= edges[0]) & (py <= edges[1]) & (px >= edges[2]) & (px <= edges[3])
    qy = np.clip(py, y_axis[0], y_axis[-1])
    qx = np.clip(px, x_axis[0], x_axis[-1])
    interp = RegularGridInterpolator((y_axis, x_axis), values, method="linear", bounds_error=False,
                                     fill_value=np.nan)
    pts = np.column_stack([np.nan_to_num(qy.ravel()), np.nan_to_num(qx.ravel())])
    out = interp(pts).reshape(py.shape + values.shape[2:])
    out[~(inside & np.isfinite(py) & np.isfinite(px))] = np.nan
    return out


def change_factors(historical: xr.DataArray, future: xr.DataArray, *, method: str,
                   ratio_floor: float = DEFAULT_RATIO_FLOOR, max_ratio: float | None = None,
                   names: dict | None = None) -> xr.DataArray:
    """Monthly change factors (month, y, x) on the model grid; see :func:`change_factor_kernel`."""
    names = {"historical": "model historical", "future": "model future", **(names or {})}
    for role, da in (("historical", historical), ("future", future)):
        if set(da.dims) != {"month", "y", "x"} or da.sizes["month"] != 12:
            raise InputError(f"{names[role]}: dims {dict(da.sizes)}; expected (month=12, y, x)")
    check_same_grid(historical, future, ref_name=names["historical"], other_name=names["future"])
    u_h, u_f = historical.attrs.get("units", ""), future.attrs.get("units", "")
    if u_h and u_f and u_h != u_f:
        raise InputError(f"{names['future']}: units {u_f!r} differ from {names['historical']}'s {u_h!r}")
    future = future.transpose(*historical.dims)
    factors = xr.apply_ufunc(change_factor_kernel, historical, future, dask="parallelized",
                             output_dtypes=[np.float64],
                             kwargs={"method": method, "ratio_floor": ratio_floor, "max_ratio": max_ratio})
    if historical.rio.crs is not None:
        factors = factors.rio.write_crs(historical.rio.crs)
    return factors


def interpolate_factors(factors: xr.DataArray, target: xr.DataArray, *, model_name: str = "model grid") -> xr.DataArray:
    """Interpolate change factors bilinearly from the (coarse) model grid onto ``target``'s cells.

    The model field is small and is loaded into memory; the target grid stays lazy (one
    task per target chunk). Target cell centres are transformed to the model CRS with
    pyproj, so the two grids may differ in CRS, resolution and longitude convention.

    Returns
    -------
    DataArray (month, y, x) on the target grid.

    Raises
    ------
    InputError
        When the target grid reaches beyond the model grid.
    """
    from pyproj import Transformer

    y_axis, x_axis, values, geographic, edges, west = _model_axes(factors.load())
    model_crs = factors.rio.crs or "EPSG:4326"
    target_crs = target.rio.crs or "EPSG:4326"
    transformer = Transformer.from_crs(target_crs, model_crs, always_xy=True)
    tx, ty = np.asarray(target["x"].values, float), np.asarray(target["y"].values, float)
    # cheap coverage check on the target's outline (densified edges) before any work
    ring_x = np.concatenate([tx, np.full(len(ty), tx[-1]), tx[::-1], np.full(len(ty), tx[0])])
    ring_y = np.concatenate([np.full(len(tx), ty[0]), ty, np.full(len(tx), ty[-1]), ty[::-1]])
    step = max(1, len(ring_x) // 4000)
    rx, ry = transformer.transform(ring_x[::step], ring_y[::step])
    rx = np.asarray(rx)
    if geographic:
        rx = wrap_longitude(rx, west)   # target longitudes on the model's own run
    outside = ~((ry >= edges[0]) & (ry <= edges[1]) & (rx >= edges[2]) & (rx <= edges[3]))
    if outside.any():
        i = int(np.argmax(outside))
        px = float(rx[i])
        if geographic:  # the point's longitude as near the model's as it can be written (not a turn away)
            px -= 360.0 * np.round((px - 0.5 * (edges[2] + edges[3])) / 360.0)
        raise InputError(f"{model_name}: does not cover the baseline grid (e.g. point x={px:.4g}, y={ry[i]:.4g} "
                         f"in the model CRS; model covers x {edges[2]:.4g}..{edges[3]:.4g}, "
                         f"y {edges[0]:.4g}..{edges[1]:.4g})")

    def _block(yy, xx):
        px, py = transformer.transform(xx, yy)
        px = np.asarray(px, dtype=float)
        if geographic:
            px = wrap_longitude(px, west)
        return bilinear_kernel(y_axis, x_axis, values, np.asarray(py, dtype=float), px, edges).astype(np.float32)

    yy, xx = xr.broadcast(target["y"].astype(float), target["x"].astype(float))
    yy = yy.drop_vars([c for c in yy.coords if c not in ("y", "x")])
    xx = xx.drop_vars([c for c in xx.coords if c not in ("y", "x")])
    if target.chunks is not None:
        chunks = dict(zip(target.dims, target.chunks))
        yy = yy.chunk({"y": chunks["y"], "x": chunks["x"]})
        xx = xx.chunk({"y": chunks["y"], "x": chunks["x"]})
    out = xr.apply_ufunc(_block, yy, xx, output_core_dims=[["month"]], dask="parallelized",
                         output_dtypes=[np.float32], dask_gufunc_kwargs={"output_sizes": {"month": 12}})
    out = out.assign_coords(month=np.arange(1, 13)).transpose("month", "y", "x")
    return out.rio.write_crs(target_crs)


def apply_delta(baseline: xr.DataArray, factors_on_baseline: xr.DataArray, *, method: str) -> xr.DataArray:
    """Baseline + change (additive) or baseline x change (ratio), month by month."""
    if method not in METHODS:
        raise InputError(f"method {method!r}; expected one of {', '.join(METHODS)}")
    factors_on_baseline = factors_on_baseline.assign_coords(month=baseline["month"].values)
    if method == "additive":
        out = baseline + factors_on_baseline
    else:
        out = baseline * factors_on_baseline
    return out.astype(np.float32).transpose("month", "y", "x")


def delta(baseline: xr.DataArray, historical: xr.DataArray, future: xr.DataArray, *, method: str,
          ratio_floor: float = DEFAULT_RATIO_FLOOR, max_ratio: float | None = None,
          names: dict | None = None) -> xr.DataArray:
    """Future monthly climate on the baseline grid by the delta (change-factor) method.

    ``future_fine[m] = baseline[m] + (F[m] - H[m])`` (additive) or
    ``baseline[m] x max(F[m], floor) / max(H[m], floor)`` (ratio), where F and H are the
    model's future and historical climatologies and the change is interpolated bilinearly
    from the model grid to each baseline cell centre.

    Parameters
    ----------
    baseline : DataArray (month, y, x)
        Observed fine-grid climatology (e.g. tmin, °C, or prec, mm).
    historical, future : DataArray (month, y, x)
        One climate model's climatologies for its historical and future periods, on one
        (coarse) grid; any CRS; longitudes 0..360 or -180..180; either latitude order.
    method : {"additive", "ratio"}
        Additive for temperature, ratio for precipitation.
    ratio_floor, max_ratio
        See :func:`change_factor_kernel`.
    names : dict, optional
        Role ("baseline", "historical", "future") -> file name for messages.

    Returns
    -------
    DataArray (month, y, x), float32, on the baseline grid; lazy if ``baseline`` is.

    Notes
    -----
    Known limits: the baseline's variability (between years, and day-to-day) is kept
    unchanged, only the mean shifts; the model's large-scale spatial pattern of change is
    imposed on the fine grid, and no fine-scale change (e.g. along a coast or mountain) is
    added.

    References
    ----------
    Hay, L.E., Wilby, R.L. & Leavesley, G.H. (2000) JAWRA 36(2): 387-397.
    """
    names = {"baseline": "baseline", "historical": "model historical", "future": "model future", **(names or {})}
    if set(baseline.dims) != {"month", "y", "x"} or baseline.sizes["month"] != 12:
        raise InputError(f"{names['baseline']}: dims {dict(baseline.sizes)}; expected (month=12, y, x)")
    factors = change_factors(historical, future, method=method, ratio_floor=ratio_floor,
                             max_ratio=max_ratio, names=names)
    on_baseline = interpolate_factors(factors, baseline.transpose("month", "y", "x"), model_name=names["historical"])
    out = apply_delta(baseline, on_baseline, method=method)
    out.name = baseline.name
    out.attrs = dict(baseline.attrs)
    out.attrs.update({"delta_method": method, "delta_reference": "Hay, Wilby & Leavesley (2000)"})
    if method == "ratio":
        out.attrs["ratio_floor"] = float(ratio_floor)
        if max_ratio is not None:
            out.attrs["max_ratio"] = float(max_ratio)
    if baseline.rio.crs is not None:
        out = out.rio.write_crs(baseline.rio.crs)
    return out
