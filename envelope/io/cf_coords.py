"""CF coordinates read the project's way: a regular grid written with only 2-D latitude/longitude."""

from __future__ import annotations

import numpy as np
import xarray as xr

from envelope.errors import InputError

__all__ = ["axes_from_2d_latlon", "degree_axes"]


def axes_from_2d_latlon(ds: xr.Dataset, path) -> xr.Dataset:
    """Give 1-D lon/lat axes to a grid whose only coordinates are 2-D latitude and longitude.

    Some deliveries write a regular latitude-longitude grid as 2-D ``lat(y, x)`` and
    ``lon(y, x)`` on dimensions without coordinate values (CF auxiliary coordinates). When
    latitude is constant along each row and longitude along each column, the grid is regular
    and its axes are the first column and row. A curvilinear grid (a rotated pole or a
    model's native mesh written only as 2-D lat/lon) cannot be read as cells of one CRS and
    is refused with what to do instead.
    """
    def two_d(kind):
        for name, var in ds.coords.items():
            if var.ndim == 2 and (var.attrs.get("standard_name") == kind
                                  or str(name).lower() in {"latitude": ("lat", "latitude"),
                                                           "longitude": ("lon", "longitude")}[kind]):
                return var
        return None

    lat, lon = two_d("latitude"), two_d("longitude")
    if lat is None or lon is None or lat.dims != lon.dims:
        return ds
    ydim, xdim = lat.dims
    if ydim in ds.variables or xdim in ds.variables:
        return ds  # the dims have their own axes (projected x/y); lat/lon are only auxiliary
    la, lo = np.asarray(lat.values, dtype=np.float64), np.asarray(lon.values, dtype=np.float64)
    tol = 1e-6 * max(1.0, float(np.nanmax(np.abs(np.diff(la[:, 0])), initial=0.0)),
                     float(np.nanmax(np.abs(np.diff(lo[0, :])), initial=0.0)))
    if not (np.all(np.isfinite(la)) and np.all(np.isfinite(lo))
            and np.nanmax(np.abs(la - la[:, :1])) <= tol and np.nanmax(np.abs(lo - lo[:1, :])) <= tol):
        raise InputError(f"{path}: a curvilinear grid ({lat.name}({ydim}, {xdim}) and {lon.name}({ydim}, {xdim}) "
                         "vary along both axes); expected a regular grid: regrid it first (for example "
                         "bilinearly onto a regular latitude-longitude grid)")
    ds = ds.drop_vars([lat.name, lon.name])
    return ds.assign_coords({
        xdim: xr.DataArray(lo[0, :], dims=xdim, attrs={"units": "degrees_east", "standard_name": "longitude"}),
        ydim: xr.DataArray(la[:, 0], dims=ydim, attrs={"units": "degrees_north", "standard_name": "latitude"}),
    })


def degree_axes(obj, xdim, ydim) -> bool:
    """Whether x/y dims are longitude/latitude in degrees: by their names, or the x axis's CF
    ``standard_name``/``units`` (as :func:`axes_from_2d_latlon` writes them)."""
    if str(xdim).lower() in ("lon", "longitude") or str(ydim).lower() in ("lat", "latitude"):
        return True
    if xdim not in obj.coords:
        return False
    attrs = obj[xdim].attrs
    return attrs.get("standard_name") == "longitude" or attrs.get("units") in ("degrees_east", "degree_east")
