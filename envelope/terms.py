"""Darwin Core vocabulary shared by the records reader (envelope.io.records) and the cleaning (envelope.records)."""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["DWC_LATITUDE", "DWC_LONGITUDE", "DWC_TAXON_TERMS", "DWC_TERMS", "MALFORMED_FLAG", "to_float"]

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
    "scientificName",
    "acceptedScientificName",
    "species",
)

#: Columns that name a record's taxon, in the order a record's taxon is taken from them: the
#: species-rank name first (so records of subspecies count under their species), then the accepted
#: and the verbatim name. ``scientificName`` is a Darwin Core term; ``species`` and
#: ``acceptedScientificName`` are added by occurrence portals to their interpreted downloads.
DWC_TAXON_TERMS = ("species", "acceptedScientificName", "scientificName")

#: Column the reader sets on rows with a wrong field count or unparseable coordinates.
MALFORMED_FLAG = "malformed"


def to_float(series: pd.Series) -> np.ndarray:
    """A column as float64, NaN where empty, not a number, or infinite."""
    if series.dtype == object or pd.api.types.is_string_dtype(series):
        series = series.astype("string").str.strip()
    values = pd.to_numeric(series, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan, copy=True)
    values[~np.isfinite(values)] = np.nan
    return values
