"""Darwin Core vocabulary shared by the records reader (envelope.io.records) and the cleaning (envelope.records)."""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["DWC_LATITUDE", "DWC_LONGITUDE", "DWC_TERMS", "MALFORMED_FLAG", "to_float"]

#: Darwin Core terms the cleaning understands (Wieczorek et al. 2012, doi:10.1371/journal.pone.0029715).
DWC_LONGITUDE = "decimalLongitude"
DWC_LATITUDE = "decimalLatitude"
DWC_TERMS = (
    DWC_LONGITUDE,
    DWC_LATITUDE,
    "coordinateUncertaintyInMeters",
    "eventDate",
    "year",
    "occurrenceStatus",
    "basisOfRecord",
    "occurrenceID",
)

#: Column the reader sets on rows with a wrong field count or unparseable coordinates.
MALFORMED_FLAG = "malformed"
def to_float(series: pd.Series) -> np.ndarray:
    """A column as float64, NaN where empty, not a number, or infinite."""
    if series.dtype == object or pd.api.types.is_string_dtype(series):
        series = series.astype("string").str.strip()
    values = pd.to_numeric(series, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan, copy=True)
    values[~np.isfinite(values)] = np.nan
    return values
