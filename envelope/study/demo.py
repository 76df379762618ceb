"""The bundled fictional demo study: where it lives, its fixed names and its species' true niche."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from envelope.errors import InputError

#: Environment variable that points at a demo study elsewhere (e.g. a non-editable install).
DEMO_DIR_ENV = "ENVELOPE_DEMO_DIR"

#: Open North Pacific box holding the invented island: (west, south, east, north) in degrees.
#: No real land lies in it (nearest: the Hawaiian chain south of 29 N, the Aleutians north of
#: 51 N, the North American coast east of 125 W).
OCEAN_BOX = (-152.0, 36.0, -142.0, 46.0)

#: Baseline and scenario band names, in band order, with their units.
CLIMATE_VARIABLES = ("bio1", "bio5", "bio6", "bio12", "bio17", "gdd5")
CLIMATE_UNITS = {
    "bio1": "degC",
    "bio5": "degC",
    "bio6": "degC",
    "bio12": "mm",
    "bio17": "mm",
    "gdd5": "degC day",
}

#: Darwin Core terms of presences.csv, in column order.
DARWIN_CORE_COLUMNS = (
    "occurrenceID",
    "scientificName",
    "decimalLongitude",
    "decimalLatitude",
    "coordinateUncertaintyInMeters",
    "eventDate",
    "year",
    "occurrenceStatus",
    "basisOfRecord",
)

#: Columns of scenarios.csv.
SCENARIO_COLUMNS = ("name", "pathway", "climate_model", "horizon", "path")

#: The invented species (no real taxon): a warm-loving ground beetle of open, sunny ground.
SPECIES = {
    "common_name": "demo sun-runner",
    "scientific_name": "Fictocarabus demonstratus",
    "group": "ground beetle (invented)",
}

#: The species' true climatic niche: suitability is the product of one response per variable.
#: ``logistic_increasing``: 1 / (1 + exp(-(x - midpoint) / scale));
#: ``logistic_decreasing``: 1 / (1 + exp((x - midpoint) / scale));
#: ``gaussian``: exp(-0.5 ((x - optimum) / width)^2).
NICHE = {
    "bio5": {"response": "gaussian", "optimum": 29.0, "width": 6.0},
    "bio6": {"response": "logistic_increasing", "midpoint": -1.0, "scale": 1.0},
    "gdd5": {"response": "logistic_increasing", "midpoint": 3400.0, "scale": 250.0},
    "bio12": {"response": "logistic_decreasing", "midpoint": 1600.0, "scale": 200.0},
}


#: Where a wheel carries the demo study inside the package (declared in setup.py).
DEMO_PACKAGE_FOLDER = "demo_data"


def _installed_demo() -> Path:
    """``envelope/demo_data/demo`` of the installed package (a wheel carries it there)."""
    from importlib.resources import files

    return Path(str(files("envelope"))) / DEMO_PACKAGE_FOLDER / "demo"


def demo_dir() -> Path:
    """Locate the bundled demo study.

    Returns
    -------
    pathlib.Path
        The folder holding ``baseline.tif``, ``scenarios.csv``, ``presences.csv`` and the rest
        (``study.toml`` is in its parent): ``$ENVELOPE_DEMO_DIR`` if set, else
        ``sample_grids/demo`` of the source checkout, else the copy an installed wheel
        carries in the package (``envelope/demo_data/demo``, found with
        :mod:`importlib.resources`).

    Raises
    ------
    InputError
        If no folder with a ``scenarios.csv`` is found; the message says how to make one.
    """
    override = os.environ.get(DEMO_DIR_ENV)
    if override:
        candidates = [Path(override)]
    else:
        candidates = [Path(__file__).resolve().parents[2] / "sample_grids" / "demo", _installed_demo()]
    for where in candidates:
        if (where / "scenarios.csv").is_file():
            return where
    where = candidates[0]
    source = f"${DEMO_DIR_ENV}" if override else "the source checkout or the installed package"
    raise InputError(
        f"{where}: demo study not found (no scenarios.csv; looked in {source}); "
        f"regenerate it with `python sample_grids/make_demo.py --out {where}` "
        f"or set {DEMO_DIR_ENV} to a folder that holds it"
    )


def _response(values, spec):
    # Common practice, no source: logistic and Gaussian response curves are the usual
    # building blocks of virtual species (a smooth, known truth to test models against).
    x = np.asarray(values, dtype="float64")
    kind = spec["response"]
    if kind == "logistic_increasing":
        return 1.0 / (1.0 + np.exp(-(x - spec["midpoint"]) / spec["scale"]))
    if kind == "logistic_decreasing":
        return 1.0 / (1.0 + np.exp((x - spec["midpoint"]) / spec["scale"]))
    if kind == "gaussian":
        return np.exp(-0.5 * ((x - spec["optimum"]) / spec["width"]) ** 2)
    raise InputError(f"niche response {kind!r}: unknown; expected logistic_increasing, logistic_decreasing or gaussian")


def true_suitability(climate, niche=None):
    """The demo species' true climatic suitability, 0-1, on any climate (baseline or scenario).

    Parameters
    ----------
    climate : mapping of str to array_like
        Arrays of one shape keyed by variable name; must hold every variable of ``niche``.
        An ``xarray.DataArray`` with a ``variable`` dimension works too.
    niche : dict, optional
        Response per variable (see ``NICHE``, the default); the responses are multiplied.

    Returns
    -------
    numpy.ndarray
        float64, NaN where any input is NaN.

    Examples
    --------
    >>> float(true_suitability({"bio5": 29.0, "bio6": -1.0, "gdd5": 3400.0, "bio12": 1600.0}))
    0.125
    """
    niche = NICHE if niche is None else niche
    out = None
    for name, spec in niche.items():
        try:
            values = climate.sel(variable=name).values if hasattr(climate, "sel") else climate[name]
        except KeyError:
            raise InputError(f"climate: variable {name!r} missing; the niche needs {sorted(niche)}") from None
        part = _response(values, spec)
        out = part if out is None else out * part
    return out
