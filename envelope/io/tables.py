"""Reading and writing the project's tables: scenario and suitability tables, land-cover class tables, delta model tables."""

from __future__ import annotations

import csv
import glob
from dataclasses import dataclass
from pathlib import Path

from envelope.errors import InputError
from envelope.io.atomic import atomic_output
from envelope.io.layers import ClimateLayer, check_layer_name

__all__ = ["SCENARIO_COLUMNS", "SCENARIO_LAYER_COLUMNS", "SUITABILITY_TABLE_COLUMNS", "SUITABILITY_TABLE_NAME", "Scenario", "group_scenarios",
           "read_class_table", "read_model_table", "read_scenarios", "suitability_paths", "write_suitability_table"]

SCENARIO_COLUMNS = ("name", "pathway", "climate_model", "horizon", "path")
#: Optional scenario-table columns mapping each climate variable to its own file: one row per
#: scenario and variable, ``band`` for one band of a multi-band file.
SCENARIO_LAYER_COLUMNS = ("variable", "band")
SUITABILITY_TABLE_COLUMNS = ("name", "pathway", "climate_model", "horizon", "path", "mess_path",
                             "novel_share")
SUITABILITY_TABLE_NAME = "suitability_table.csv"
# The delta method's model table: one row per scenario and monthly variable.
MODEL_TABLE_COLUMNS = ("name", "pathway", "climate_model", "horizon", "variable", "historical", "future")
MODEL_TABLE_OPTIONAL = ("model_variable",)  # NetCDF variable to read from the model files (default: `variable`)


@dataclass(frozen=True)
class Scenario:
    """One row of a scenario table: a climate grid for one pathway, climate model and horizon."""

    name: str
    pathway: str
    climate_model: str
    horizon: int
    path: Path
    mess_path: Path | None = None     # suitability tables only: the scenario's MESS raster
    novel_share: float | None = None  # suitability tables only: share of the area with MESS < 0
    layers: tuple = ()                # one ClimateLayer per variable when the table maps variables to files

    @property
    def climate(self) -> list:
        """What :func:`envelope.io.rasters.open_climate` opens: the named layers, or the one grid file."""
        return list(self.layers) if self.layers else [self.path]


def _rows_from_csv(path: Path) -> list[dict]:
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            reader = csv.DictReader(fh)
            header = [h.strip() for h in (reader.fieldnames or [])]
            missing = [c for c in SCENARIO_COLUMNS if c not in header]
            if missing:
                raise InputError(f"{path}: column {missing[0]!r} missing (found {', '.join(header) or 'none'}; "
                                 f"expected {', '.join(SCENARIO_COLUMNS)})")
            return [{(k or "").strip(): (v or "").strip() for k, v in row.items()} for row in reader]
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise InputError(f"{path}: cannot read the scenario table ({exc})") from None


def _rows_from_toml(path: Path) -> list[dict]:
    import tomllib

    try:
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise InputError(f"{path}: cannot read the scenario table ({exc})") from None
    except RecursionError:
        raise InputError(f"{path}: cannot read the scenario table (nested too deeply); "
                         "expected [[scenario]] tables") from None
    rows = doc.get("scenario")
    if not isinstance(rows, list) or not all(isinstance(r, dict) for r in rows):
        raise InputError(f"{path}: expected [[scenario]] tables with keys {', '.join(SCENARIO_COLUMNS)}")
    for i, row in enumerate(rows, start=1):
        missing = [c for c in SCENARIO_COLUMNS if c not in row]
        if missing:
            raise InputError(f"{path}: scenario {i} has no key {missing[0]!r} "
                             f"(expected {', '.join(SCENARIO_COLUMNS)})")
    return [{k: str(v) for k, v in row.items()} for row in rows]


def _resolve(table: Path, value: str) -> Path:
    p = Path(value)
    return p if p.is_absolute() else table.parent / p


def read_scenarios(path, *, what: str = "climate grid") -> list[Scenario]:
    """Read a scenario table (CSV with a header, or TOML with ``[[scenario]]`` tables).

    Columns / keys: ``name, pathway, climate_model, horizon, path``. ``horizon`` is a
    year; ``path`` is a climate grid (or, ``what`` says, another raster such as a
    suitability map), relative to the table's folder unless absolute. Names must be
    unique (they name the output files) and every grid must exist. With the optional
    column ``variable`` (and ``band``) a scenario takes one row per climate variable, each
    naming that variable's file (and band): its rows share name, pathway, climate model
    and horizon, and the scenario's grid is those named layers (``Scenario.layers``). The suitability table
    that ``envelope project --scenarios`` writes has the optional columns ``mess_path``
    (relative like ``path``) and ``novel_share``; this one reader reads it too.

    Examples
    --------
    >>> read_scenarios("scenarios.csv")  # doctest: +SKIP
    [Scenario(name='p1-mA-2050', pathway='p1', climate_model='mA', horizon=2050, path=...)]
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: scenario table not found")
    suffix = path.suffix.lower()
    if suffix == ".csv":
        rows = _rows_from_csv(path)
    elif suffix == ".toml":
        rows = _rows_from_toml(path)
    else:
        raise InputError(f"{path}: scenario table suffix {path.suffix!r}; expected .csv or .toml")
    if not rows:
        raise InputError(f"{path}: the scenario table has no rows; expected at least one scenario")
    scenarios, seen, by_name = [], set(), {}
    for i, row in enumerate(rows, start=1):
        name = row["name"]
        if not name or any(c in name for c in "/\\") or name in (".", ".."):
            raise InputError(f"{path}: row {i} name {name!r}; expected a non-empty name without slashes")
        variable = (row.get("variable") or "").strip()
        if name in seen and not (variable and name in by_name):
            raise InputError(f"{path}: scenario name {name!r} appears twice; names must be unique"
                             + ("" if variable else " (or give each row a 'variable')"))
        seen.add(name)
        for key in ("pathway", "climate_model"):
            if not row[key]:
                raise InputError(f"{path}: row {i} ({name}) has an empty {key!r}")
        try:
            horizon = int(float(row["horizon"]))
        except ValueError:
            raise InputError(f"{path}: row {i} ({name}) horizon {row['horizon']!r}; expected a year") from None
        grid = _resolve(path, row["path"])
        if not row["path"] or not grid.is_file():
            raise InputError(f"{path}: row {i} ({name}) {what} {grid} not found")
        if variable:
            check_layer_name(variable, f"{path}: row {i} ({name}) variable")
            band = (row.get("band") or "").strip()
            layer = ClimateLayer(variable, grid, int(band) if band.isdigit() else (band or None))
            if name in by_name:
                first = by_name[name]
                if (first.pathway, first.climate_model, first.horizon) != (row["pathway"], row["climate_model"], horizon):
                    raise InputError(f"{path}: row {i} ({name}) has a different pathway, climate model or horizon "
                                     "than the scenario's earlier rows")
                if variable in {lay.name for lay in first.layers}:
                    raise InputError(f"{path}: row {i}: scenario {name!r} lists variable {variable!r} twice")
                updated = Scenario(first.name, first.pathway, first.climate_model, first.horizon, first.path,
                                   layers=first.layers + (layer,))
                scenarios[scenarios.index(first)] = updated
                by_name[name] = updated
                continue
        mess = _resolve(path, row["mess_path"]) if row.get("mess_path") else None
        if mess is not None and not mess.is_file():
            raise InputError(f"{path}: row {i} ({name}) column 'mess_path' names {row['mess_path']!r}, which is not a file")
        novel = row.get("novel_share")
        try:
            novel = float(novel) if novel not in (None, "", "nan", "NaN") else None
        except ValueError:
            raise InputError(f"{path}: row {i} ({name}) novel_share {novel!r}; expected a share between 0 and 1") from None
        scenario = Scenario(name, row["pathway"], row["climate_model"], horizon, grid, mess, novel,
                            layers=(layer,) if variable else ())
        scenarios.append(scenario)
        if variable:
            by_name[name] = scenario
    return scenarios


def suitability_paths(path) -> dict[str, list[tuple[int, Path]]]:
    """Climate paths from a suitability table: {"<pathway>/<climate_model>": [(horizon, map), ...]}.

    The table is the one ``envelope project --scenarios`` writes (``suitability_table.csv``;
    columns ``name, pathway, climate_model, horizon, path``, ``path`` a suitability raster).
    One path per pathway × climate model, its horizons in time order; a climate model
    listed twice for one pathway and horizon is an error.
    """
    scenarios = read_scenarios(path, what="suitability raster")
    group_scenarios(scenarios)
    paths: dict[str, list[tuple[int, Path]]] = {}
    for sc in scenarios:
        paths.setdefault(f"{sc.pathway}/{sc.climate_model}", []).append((sc.horizon, sc.path))
    return {name: sorted(horizons) for name, horizons in paths.items()}


def group_scenarios(scenarios) -> dict[tuple[str, int], list[Scenario]]:
    """Scenarios grouped by (pathway, horizon), in table order; the members differ by climate model."""
    groups: dict[tuple[str, int], list[Scenario]] = {}
    for sc in scenarios:
        groups.setdefault((sc.pathway, sc.horizon), []).append(sc)
    for (pathway, horizon), members in groups.items():
        models = [m.climate_model for m in members]
        dup = sorted({m for m in models if models.count(m) > 1})
        if dup:
            raise InputError(f"scenario table: climate model {dup[0]!r} appears twice for pathway "
                             f"{pathway!r}, horizon {horizon}")
    return groups


def write_suitability_table(rows, path, *, overwrite: bool = False) -> Path:
    """Write the per-scenario suitability table (CSV) that ``envelope change --scenarios`` reads.

    ``rows`` are mappings with keys :data:`SUITABILITY_TABLE_COLUMNS`; paths are written
    as given.
    """
    with atomic_output(path, overwrite=overwrite) as tmp:
        with open(tmp, "w", newline="", encoding="utf-8") as fh:
            writer = csv.DictWriter(fh, fieldnames=SUITABILITY_TABLE_COLUMNS, extrasaction="ignore")
            writer.writeheader()
            for row in rows:
                writer.writerow({k: ("" if row.get(k) is None else row.get(k)) for k in SUITABILITY_TABLE_COLUMNS})
    return Path(path)


def read_class_table(path) -> dict:
    """Read a land-cover class table: CSV with columns ``code`` and ``habitat_quality`` (0–1).

    Other columns (e.g. ``name``) are ignored. Codes must be unique integers.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    dict of int -> float
        Class code to habitat quality.

    Raises
    ------
    InputError
        Missing file or column, non-integer or duplicate code, quality not a number in 0–1,
        empty table. The message names the file, the column and the row.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: class table not found")
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            reader = csv.DictReader(fh)
            columns = [c.strip() for c in (reader.fieldnames or [])]
            rows = list(reader)
    except (UnicodeDecodeError, csv.Error) as exc:
        raise InputError(f"{path}: not a readable CSV class table ({exc})") from None
    for column in ("code", "habitat_quality"):
        if column not in columns:
            raise InputError(f"{path}: column {column!r} missing (found {', '.join(columns) or 'no columns'}; "
                             f"expected code,habitat_quality)")
    table = {}
    for line, row in enumerate(rows, start=2):  # line 1 is the header
        row = {(k or "").strip(): (v or "").strip() for k, v in row.items() if k is not None}
        raw_code, raw_quality = row.get("code", ""), row.get("habitat_quality", "")
        try:
            code_f = float(raw_code)
            if not code_f.is_integer():
                raise ValueError
            code = int(code_f)
        except ValueError:
            raise InputError(f"{path}: line {line}, column 'code': expected an integer class code, "
                             f"got {raw_code!r}") from None
        try:
            quality = float(raw_quality)
        except ValueError:
            raise InputError(f"{path}: line {line}, column 'habitat_quality': expected a number in 0–1, "
                             f"got {raw_quality!r}") from None
        if not (0.0 <= quality <= 1.0):
            raise InputError(f"{path}: line {line}, column 'habitat_quality': {quality:g} for code {code} "
                             f"is outside 0–1")
        if code in table:
            raise InputError(f"{path}: column 'code': code {code} appears twice (line {line})")
        table[code] = quality
    if not table:
        raise InputError(f"{path}: class table has no rows")
    return table


def read_model_table(path) -> dict[str, dict]:
    """Read MODELS.csv: one row per scenario and monthly variable; paths relative to the table.

    A path may be a glob pattern (``mA/tasmin_hist_*.nc``): the files of one monthly series.

    Returns scenario name -> {"pathway", "climate_model", "horizon", "files": {variable: (hist, fut)}
    (each a Path, or a sorted list of Paths for a pattern),
    "model_variables": {variable: NetCDF variable name from the optional ``model_variable`` column, or None}}.
    """
    path = Path(path)
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            reader = csv.DictReader(fh)
            header = [h.strip() for h in reader.fieldnames or []]
            raw = [(reader.line_num, row) for row in reader]
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise InputError(f"{path}: cannot read the model table ({exc})") from None
    missing = [c for c in MODEL_TABLE_COLUMNS if c not in header]
    if missing:
        raise InputError(f"{path}: column {missing[0]!r} missing (found {', '.join(header) or 'none'}; "
                         f"expected {', '.join(MODEL_TABLE_COLUMNS)})")
    rows, lines = [], []
    for i, row in raw:  # the line a row ends on
        fields = len(header) + len(row.get(None) or []) - sum(v is None for k, v in row.items() if k is not None)
        if fields != len(header):
            raise InputError(f"{path}: line {i} has {fields} fields; expected {len(header)} ({', '.join(header)})")
        rows.append({(k or "").strip(): (v or "").strip() for k, v in row.items() if k is not None})
        lines.append(i)
    if not rows:
        raise InputError(f"{path}: no rows; expected one row per scenario and variable")
    scenarios: dict[str, dict] = {}
    for i, row in zip(lines, rows):
        name = row["name"]
        if not name or any(c in name for c in "/\\"):
            raise InputError(f"{path}: line {i} name {name!r}; expected a non-empty name without slashes")
        try:
            horizon = int(float(row["horizon"]))
        except ValueError:
            raise InputError(f"{path}: line {i} horizon {row['horizon']!r}; expected a year") from None
        meta = {"pathway": row["pathway"], "climate_model": row["climate_model"], "horizon": horizon}
        entry = scenarios.setdefault(name, {**meta, "files": {}, "model_variables": {}})
        if {k: entry[k] for k in meta} != meta:
            raise InputError(f"{path}: line {i}: scenario {name!r} has a different pathway, climate model "
                             "or horizon than on its earlier lines")
        var = row["variable"]
        if not var:
            raise InputError(f"{path}: line {i} column 'variable' is empty; expected a monthly variable "
                             "(tmin, tmax, prec or tmean)")
        if var in entry["files"]:
            raise InputError(f"{path}: line {i}: scenario {name!r} lists variable {var!r} twice")
        entry["files"][var] = tuple(_model_files(path, i, col, row[col]) for col in ("historical", "future"))
        entry["model_variables"][var] = row.get("model_variable") or None
    return scenarios


def _model_files(table: Path, line: int, column: str, text: str):
    """A model-table cell: one file, or a glob pattern of a series' files (a sorted list), relative to the table."""
    if not text:
        raise InputError(f"{table}: line {line} column {column!r} is empty; expected a file path or a glob pattern")
    p = Path(text)
    p = p if p.is_absolute() else table.parent / p
    if glob.has_magic(text):
        found = sorted(Path(f) for f in glob.glob(str(p)))
        if not found:
            raise InputError(f"{table}: line {line} {column} pattern {text!r} matches no file (looked in {p.parent})")
        return found
    if not p.is_file():
        raise InputError(f"{table}: line {line} {column} file {p} not found")
    return p
