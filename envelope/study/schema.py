"""The TOML study file: its schema, validation before any work starts, and loading into frozen settings."""

from __future__ import annotations

import difflib
import math
import os
import re
import tomllib
from dataclasses import dataclass, fields, replace
from pathlib import Path

from envelope.errors import InputError
from envelope.models import BIAS_METHODS, COVARIATE_METHODS, FEATURE_CLASSES, METHOD_NAMES
from envelope.kernels.dispersal import KERNEL_KINDS
from envelope.kernels.thresholds import THRESHOLD_RULES
from envelope.ensemble import DEFAULT_AGREEMENT
from envelope.io.tables import SCENARIO_COLUMNS, Scenario, read_scenarios

__all__ = [
    "ClimateSection", "ComputeSection", "DispersalSection", "HabitatSection", "ModelSection",
    "OutputsSection", "RecordsSection", "RegionSection", "ScenarioSection", "Study", "StudySection",
    "load_study", "ALL_SPECIES", "OUTPUT_FORMATS",
]

OUTPUT_FORMATS = ("tif", "nc")
#: ``records.species = "all"``: every taxon the records name, each in its own run folder
ALL_SPECIES = "all"
CV_SCHEMES = ("block", "random")

# scheme://host:port, host a name, an IPv4 address or a bracketed IPv6 address; this is the
# form dask.distributed prints for a scheduler (e.g. tcp://127.0.0.1:8786).
_ADDRESS = re.compile(r"^[a-z][a-z0-9+.-]*://(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9._-]+):(\d{1,5})$")
# tomllib's messages end "(at line N, column M)" (CPython 3.11 Lib/tomllib/_parser.py)
_TOML_WHERE = re.compile(r"^(?P<msg>.*?)\s*\(at line (?P<line>\d+), column (?P<col>\d+)\)$")
_MISSING = object()


# --------------------------------------------------------------------------- sections
@dataclass(frozen=True)
class StudySection:
    """``[study]``: what the study is called and asks (for the report)."""

    name: str
    question: str = ""
    species: str = ""


@dataclass(frozen=True)
class RecordsSection:
    """``[records]``: the occurrence table and its cleaning rules."""

    path: Path
    x_column: str | None = None
    y_column: str | None = None
    crs: str | None = None
    max_uncertainty_m: float | None = None
    years: tuple[int, int] | None = None
    thin_km: float = 0.0
    #: one taxon (a name; "" = the records' one taxon), or a multi-species study: a tuple of
    #: names, or "all" (every taxon the records name); see :attr:`Study.multi_species`
    species: str | tuple[str, ...] = ""
    absences: bool = False


@dataclass(frozen=True)
class ClimateSection:
    """``[climate]``: the baseline grid(s) or named layers, the variables to use and the baseline year.

    ``baseline`` holds the files of ``climate.baseline`` (paths) followed by the named layers
    of ``[climate.layers]`` (:class:`envelope.io.layers.ClimateLayer`).
    """

    baseline: tuple
    variables: tuple[str, ...] | None = None
    now_year: float = 2020


@dataclass(frozen=True)
class ModelSection:
    """``[model]``: method(s), background, bias, spatial cross-validation and threshold rule."""

    methods: tuple[str, ...] = ("pointprocess",)
    background: int = 10_000
    bias: Path | None = None
    bias_method: str = "auto"
    blocks_km: float | None = None
    folds: int = 5
    cv: str = "block"
    threshold_rule: str | float = "max-sss"
    seed: int = 0
    features: str | tuple[str, ...] = "cv"
    background_buffer_km: float | None = None
    autocovariate_km: float | None = None


@dataclass(frozen=True)
class RegionSection:
    """``[region]``: the study region (a vector file); background is drawn inside it, and with
    ``clip`` the projections and the spread are limited to it too."""

    path: Path
    clip: bool = False


@dataclass(frozen=True)
class ScenarioSection:
    """``[scenarios]``: where the scenario set came from and the consensus agreement level."""

    table: Path | None = None
    agreement: float = DEFAULT_AGREEMENT


@dataclass(frozen=True)
class HabitatSection:
    """``[habitat]``: habitat fraction 0–1, or land cover with a class table."""

    path: Path
    classes: Path | None = None
    align: bool = False


@dataclass(frozen=True)
class DispersalSection:
    """``[dispersal]``: kernel, distance per step, time step, colonisation and persistence."""

    kernel: str
    mean_distance_km: float
    mean_distance_range_km: tuple[float, float] | None = None
    shape: float | None = None
    step_years: float = 1.0
    rate: float = 1.0
    persistence_years: float = 0.0
    replicates: int = 0
    start: Path | None = None
    counterfactual: bool = True


@dataclass(frozen=True)
class OutputsSection:
    """``[outputs]``: which products to make and the raster format."""

    mess: bool = True
    ensemble: bool = True
    change: bool = True
    reach: bool = True
    figures: bool = True
    report: bool = True
    format: str = "tif"


@dataclass(frozen=True)
class ComputeSection:
    """``[compute]``: where the dask work runs (local threads when no scheduler is given)."""

    scheduler: str | None = None


@dataclass(frozen=True)
class Study:
    """A validated study file; every path is absolute, resolved against the file's folder.

    ``habitat`` and ``dispersal`` are None when ``outputs.reach`` is false and the tables are
    absent. ``scenarios`` lists the scenario grids (from ``scenarios.table`` or the inline
    ``[[scenarios.grid]]`` entries), in file order.
    """

    path: Path
    study: StudySection
    records: RecordsSection
    climate: ClimateSection
    model: ModelSection
    scenario_set: ScenarioSection
    scenarios: list
    habitat: HabitatSection | None
    dispersal: DispersalSection | None
    outputs: OutputsSection
    compute: ComputeSection
    region: RegionSection | None = None
    margins: object = None    # envelope.study.observed.MarginsSection, from [margins]

    @property
    def name(self) -> str:
        return self.study.name

    @property
    def multi_species(self) -> bool:
        """True when ``records.species`` is a list of names or ``"all"``: one run folder per species."""
        return isinstance(self.records.species, tuple) or self.records.species == ALL_SPECIES

    @property
    def folder(self) -> Path:
        """The folder relative paths in the file were resolved against."""
        return self.path.parent

    def to_dict(self, *, relative: bool = False) -> dict:
        """Every setting, defaults filled in, as JSON-ready built-ins (for the manifest and hashing).

        Paths are absolute strings, or relative to the study folder when ``relative`` is true
        (POSIX separators), which keeps a moved study folder's dict unchanged. The study file's
        own path is left out (it is ``Study.path``); keys follow the schema's order.
        """
        def plain(value):
            if isinstance(value, Path):
                if relative:
                    return Path(_relpath(value, self.folder)).as_posix()
                return str(value)
            if isinstance(value, (tuple, list)):
                return [plain(v) for v in value]
            if hasattr(value, "__dataclass_fields__"):
                return {f.name: plain(getattr(value, f.name)) for f in fields(value)}
            return value

        out = {}
        for f in fields(self):
            if f.name == "path":
                continue
            if f.name == "scenario_set":
                out["scenarios"] = {**plain(self.scenario_set), "grid": plain(self.scenarios)}
            elif f.name != "scenarios":
                out[f.name] = plain(getattr(self, f.name))
        return out


def _relpath(path: Path, folder: Path) -> str:
    return os.path.relpath(path, folder)


# --------------------------------------------------------------------------- value checks
def _kind(value) -> str:
    """The TOML name of a value's type, for messages."""
    if isinstance(value, bool):
        return "bool"
    return {str: "str", int: "int", float: "float", list: "array", dict: "table"}.get(
        type(value), type(value).__name__)


def _show(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


class _Checker:
    """Validates one study file; every error names the file, the dotted key, the value and what is allowed."""

    def __init__(self, source: Path, folder: Path):
        self.source = source
        self.folder = folder

    def fail(self, key: str, message: str):
        raise InputError(f"{self.source}: {key}: {message}")

    def bad(self, key: str, expected: str, value):
        self.fail(key, f"expected {expected}, got {_show(value)} ({_kind(value)})")

    def table(self, doc: dict, name: str, allowed, *, required: bool = False, why: str = ""):
        """The sub-table ``name`` of ``doc`` (``{}`` when absent and optional), its keys checked."""
        if name not in doc:
            if required:
                self.fail(name, f"missing table [{name}]{why}; expected keys {', '.join(allowed)}")
            return None
        t = doc[name]
        if not isinstance(t, dict):
            self.bad(name, f"a table [{name}]", t)
        self.keys(t, name, allowed)
        return t

    def keys(self, t: dict, where: str, allowed):
        for key in t:
            if key not in allowed:
                close = difflib.get_close_matches(key, allowed, n=1)
                hint = f" (did you mean {close[0]!r}?)" if close else ""
                what = f"[{where}]" if where else "the top level"
                name = f"{where}.{key}" if where else key
                raise InputError(f"{self.source}: unknown key {name!r}{hint}; allowed in {what}: "
                                 f"{', '.join(allowed)}")

    @staticmethod
    def raw(t: dict, key: str, default):
        return t.get(key, default) if t is not None else default

    def required(self, t: dict, where: str, key: str, expected: str):
        if t is None or key not in t:
            self.fail(f"{where}.{key}", f"missing; expected {expected}")
        return t[key]

    def string(self, key, value, *, choices=None, allow_empty=False):
        if not isinstance(value, str) or (not allow_empty and not value.strip()):
            self.bad(key, "one of " + ", ".join(map(repr, choices)) if choices else "a non-empty string", value)
        if choices and value not in choices:
            close = difflib.get_close_matches(value, choices, n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            self.fail(key, f"expected one of {', '.join(map(repr, choices))}, got {value!r}{hint}")
        return value

    def boolean(self, key, value):
        if not isinstance(value, bool):
            self.bad(key, "true or false", value)
        return value

    def number(self, key, value, *, integer=False, gt=None, ge=None, le=None):
        """A finite int/float (never a bool) within the bounds; ``integer`` demands a TOML integer."""
        bounds = []
        if gt is not None:
            bounds.append(f"> {gt}")
        if ge is not None:
            bounds.append(f">= {ge}")
        if le is not None:
            bounds.append(f"<= {le}")
        expected = ("an integer" if integer else "a number") + (" " + " and ".join(bounds) if bounds else "")
        ok_type = isinstance(value, int) if integer else isinstance(value, (int, float))
        if isinstance(value, bool) or not ok_type or not math.isfinite(value):
            self.bad(key, expected, value)
        if (gt is not None and not value > gt) or (ge is not None and not value >= ge) or \
                (le is not None and not value <= le):
            self.bad(key, expected, value)
        return value

    def file(self, key, value, *, what="a file") -> Path:
        """A path (relative to the study folder unless absolute) that must name an existing file."""
        if not isinstance(value, str) or not value.strip():
            self.bad(key, f"the path of {what} (a string)", value)
        path = Path(value).expanduser()
        if not path.is_absolute():
            path = self.folder / path
        path = Path(_normalise(path))
        if not path.is_file():
            self.fail(key, f"file not found: {path}" + (" (a folder)" if path.is_dir() else ""))
        return path

    def string_list(self, key, value, *, choices=None) -> tuple[str, ...]:
        expected = "a non-empty array of " + ("names from " + ", ".join(map(repr, choices)) if choices
                                              else "strings")
        if not isinstance(value, list) or not value:
            self.bad(key, expected, value)
        for i, item in enumerate(value):
            self.string(f"{key}[{i + 1}]", item, choices=choices)
        dup = sorted({v for v in value if value.count(v) > 1})
        if dup:
            self.fail(key, f"{dup[0]!r} is listed twice; expected each name once")
        return tuple(value)


def _normalise(path: Path) -> str:
    return os.path.normpath(os.path.abspath(path))


# --------------------------------------------------------------------------- sections
_TOP = ("study", "records", "climate", "model", "scenarios", "habitat", "dispersal", "outputs", "compute", "region",
        "margins")
_STUDY = ("name", "question", "species")
_RECORDS = ("path", "x_column", "y_column", "crs", "max_uncertainty_m", "years", "thin_km", "species", "absences")
_CLIMATE = ("baseline", "layers", "variables", "now_year")
_MODEL = ("methods", "background", "bias", "bias_method", "blocks_km", "folds", "cv", "threshold_rule", "seed",
          "features", "background_buffer_km", "autocovariate_km")
_REGION = ("path", "clip")
_LAYER = ("path", "band")
_SCENARIOS = ("table", "grid", "agreement")
_HABITAT = ("path", "classes", "align")
_DISPERSAL = ("kernel", "mean_distance_km", "shape", "step_years", "rate", "persistence_years",
              "replicates", "start", "counterfactual")
_OUTPUTS = ("mess", "ensemble", "change", "reach", "figures", "report", "format")
_COMPUTE = ("scheduler",)


def _study(c: _Checker, doc) -> StudySection:
    t = c.table(doc, "study", _STUDY, required=True)
    name = c.string("study.name", c.required(t, "study", "name", "the study's name (a string)"))
    return StudySection(
        name=name,
        question=c.string("study.question", c.raw(t, "question", ""), allow_empty=True),
        species=c.string("study.species", c.raw(t, "species", ""), allow_empty=True),
    )


def _records(c: _Checker, doc) -> RecordsSection:
    t = c.table(doc, "records", _RECORDS, required=True)
    path = c.file("records.path", c.required(t, "records", "path", "the path of an occurrence table"),
                  what="an occurrence table")
    x_col, y_col, crs = (c.raw(t, k, None) for k in ("x_column", "y_column", "crs"))
    for key, v in (("x_column", x_col), ("y_column", y_col), ("crs", crs)):
        if v is not None:
            c.string(f"records.{key}", v)
    if (x_col is None) != (y_col is None):
        given, other = ("x_column", "y_column") if x_col is not None else ("y_column", "x_column")
        c.fail(f"records.{other}", f"missing; records.{given} is given, so name both coordinate columns")
    if x_col is not None and crs is None:
        c.fail("records.crs", "missing; named coordinate columns need their CRS, e.g. 'EPSG:3035'")
    if crs is not None:
        from envelope.grids import parse_crs

        parse_crs(crs, where=f"{c.source}: records.crs")
    max_unc = c.raw(t, "max_uncertainty_m", None)
    if max_unc is not None:
        max_unc = float(c.number("records.max_uncertainty_m", max_unc, gt=0))
    years = c.raw(t, "years", None)
    if years is not None:
        if not (isinstance(years, list) and len(years) == 2
                and all(isinstance(y, int) and not isinstance(y, bool) for y in years)):
            c.bad("records.years", "two integer years [first, last]", years)
        if years[0] > years[1]:
            c.fail("records.years", f"expected [first, last] with first <= last, got {years}")
        years = (years[0], years[1])
    thin = float(c.number("records.thin_km", c.raw(t, "thin_km", 0.0), ge=0))
    species = _records_species(c, c.raw(t, "species", ""))
    absences = c.boolean("records.absences", c.raw(t, "absences", False))
    return RecordsSection(path, x_col, y_col, crs, max_unc, years, thin, species, absences)


def _records_species(c: _Checker, value) -> str | tuple[str, ...]:
    """``records.species``: one name (a string), a list of names, or "all" (a multi-species study)."""
    if isinstance(value, list):
        names = c.string_list("records.species", [v.strip() if isinstance(v, str) else v for v in value])
        if ALL_SPECIES in names:
            c.fail("records.species", f"{ALL_SPECIES!r} stands alone (species = \"{ALL_SPECIES}\"), not in a list of names")
        return names
    if not isinstance(value, str):
        c.bad("records.species", f"a taxon name, a list of names, or \"{ALL_SPECIES}\"", value)
    return value.strip()


def _climate(c: _Checker, doc) -> ClimateSection:
    t = c.table(doc, "climate", _CLIMATE, required=True)
    if "baseline" not in t and "layers" not in t:
        c.fail("climate.baseline", "missing; expected a climate grid file, an array of single-band files, "
                                   "or a [climate.layers] table naming each variable's file")
    paths = ()
    base = t.get("baseline")
    if isinstance(base, list):
        if not base:
            c.bad("climate.baseline", "a climate grid file, or a non-empty array of single-band files", base)
        paths = tuple(c.file(f"climate.baseline[{i + 1}]", p, what="a climate grid") for i, p in enumerate(base))
        if len(set(paths)) < len(paths):
            c.fail("climate.baseline", "a file is listed twice; expected each single-band file once")
    elif base is not None:
        paths = (c.file("climate.baseline", base, what="a climate grid"),)
    paths += _climate_layers(c, t.get("layers"))
    variables = c.raw(t, "variables", None)
    if variables is not None:
        variables = c.string_list("climate.variables", variables)
    now_year = c.number("climate.now_year", c.raw(t, "now_year", 2020))
    return ClimateSection(paths, variables, now_year)


def _climate_layers(c: _Checker, layers) -> tuple:
    """``[climate.layers]``: NAME = "PATH", NAME = "PATH:BAND" or NAME = {path = "...", band = N}."""
    from envelope.io.layers import ClimateLayer, check_layer_name

    if layers is None:
        return ()
    if not isinstance(layers, dict) or not layers:
        c.bad("climate.layers", "a table [climate.layers] of NAME = \"PATH\" entries", layers)
    out = []
    for name, value in layers.items():
        key = f"climate.layers.{name}"
        try:
            check_layer_name(name, f"{c.source}: {key}")
        except InputError as exc:
            raise InputError(str(exc)) from None
        band = None
        if isinstance(value, dict):
            c.keys(value, key, _LAYER)
            path = c.file(f"{key}.path", c.required(value, key, "path", "the layer's raster file"),
                          what="a climate layer")
            band = value.get("band")
            if band is not None and not (isinstance(band, str) and band.strip()):
                band = c.number(f"{key}.band", band, integer=True, ge=1)
        elif isinstance(value, str) and ":" in value and not (c.folder / value).is_file() \
                and not Path(value).is_file():
            head, _, tail = value.rpartition(":")
            path = c.file(key, head, what="a climate layer")
            band = int(tail) if tail.isdigit() else tail
        else:
            path = c.file(key, value, what="a climate layer")
        out.append(ClimateLayer(name, path, band))
    return tuple(out)


def _region(c: _Checker, doc) -> RegionSection | None:
    t = c.table(doc, "region", _REGION)
    if t is None:
        return None
    path = c.file("region.path", c.required(t, "region", "path", "a GeoPackage, GeoJSON or shapefile of polygons"),
                  what="a study region (vector file)")
    return RegionSection(path, c.boolean("region.clip", t.get("clip", False)))


def _model(c: _Checker, doc) -> ModelSection:
    t = c.table(doc, "model", _MODEL) or {}
    methods = c.string_list("model.methods", t.get("methods", ["pointprocess"]), choices=METHOD_NAMES)
    bias = t.get("bias")
    bias = None if bias is None else c.file("model.bias", bias, what="a bias (effort) layer")
    bias_method = c.string("model.bias_method", t.get("bias_method", "auto"), choices=BIAS_METHODS)
    if bias_method != "auto" and bias is None:
        c.fail("model.bias_method", f"{bias_method!r} given without model.bias; expected a bias (effort) layer "
                                    "to correct for, or no bias_method")
    if bias_method == "covariate":
        others = [m for m in methods if m not in COVARIATE_METHODS]
        if others:
            c.fail("model.bias_method", f"'covariate' works with the point-process model only, but methods include "
                                        f"{others[0]!r}; expected 'auto' (covariate for pointprocess, weighted "
                                        "for the others) or 'weighted'")
    blocks = t.get("blocks_km")
    blocks = None if blocks is None else float(c.number("model.blocks_km", blocks, gt=0))
    rule = t.get("threshold_rule", "max-sss")
    if isinstance(rule, str):
        c.string("model.threshold_rule", rule, choices=THRESHOLD_RULES)
    else:
        expected = f"one of {', '.join(map(repr, THRESHOLD_RULES))} or a number in [0, 1]"
        if isinstance(rule, bool) or not isinstance(rule, (int, float)) or not 0 <= rule <= 1:
            c.bad("model.threshold_rule", expected, rule)
        rule = float(rule)
    features = t.get("features", "cv")
    if isinstance(features, str):
        c.string("model.features", features, choices=("cv",))
    else:
        features = c.string_list("model.features", features, choices=FEATURE_CLASSES)
        features = tuple(f for f in FEATURE_CLASSES if f in features)
    return ModelSection(
        methods=methods,
        background=c.number("model.background", t.get("background", 10_000), integer=True, ge=100),
        bias=bias,
        bias_method=bias_method,
        blocks_km=blocks,
        folds=c.number("model.folds", t.get("folds", 5), integer=True, ge=2, le=20),
        cv=c.string("model.cv", t.get("cv", "block"), choices=CV_SCHEMES),
        threshold_rule=rule,
        seed=c.number("model.seed", t.get("seed", 0), integer=True, ge=0, le=2**32 - 1),
        features=features,
        background_buffer_km=(None if t.get("background_buffer_km") is None else
                              float(c.number("model.background_buffer_km", t["background_buffer_km"], gt=0))),
        autocovariate_km=(None if t.get("autocovariate_km") is None
                          else float(c.number("model.autocovariate_km", t["autocovariate_km"], gt=0))),
    )


def _scenario_entry(c: _Checker, i: int, entry) -> Scenario:
    key = f"scenarios.grid[{i}]"
    if not isinstance(entry, dict):
        c.bad(key, f"a table with keys {', '.join(SCENARIO_COLUMNS)}", entry)
    c.keys(entry, key, SCENARIO_COLUMNS)
    name = c.string(f"{key}.name", c.required(entry, key, "name", "a scenario name (a string)"))
    if any(ch in name for ch in "/\\"):
        c.fail(f"{key}.name", f"expected a name without slashes (it names output files), got {name!r}")
    pathway = c.string(f"{key}.pathway", c.required(entry, key, "pathway", "a pathway name (a string)"))
    model = c.string(f"{key}.climate_model",
                     c.required(entry, key, "climate_model", "a climate model name (a string)"))
    horizon = c.number(f"{key}.horizon", c.required(entry, key, "horizon", "a year (an integer)"), integer=True)
    path = c.file(f"{key}.path", c.required(entry, key, "path", "the path of a climate grid"),
                  what="a climate grid")
    return Scenario(name, pathway, model, horizon, path)


def _scenarios(c: _Checker, doc, now_year) -> tuple[ScenarioSection, list]:
    t = c.table(doc, "scenarios", _SCENARIOS, required=True)
    has_table, has_grid = "table" in t, "grid" in t
    if has_table == has_grid:
        c.fail("scenarios", "expected exactly one of scenarios.table (a CSV) or [[scenarios.grid]] entries, got "
               + ("both" if has_table else "neither"))
    table = None
    if has_table:
        table = c.file("scenarios.table", t["table"], what="a scenario table")
        try:
            scenarios = read_scenarios(table)
        except InputError as exc:
            c.fail("scenarios.table", str(exc))
    else:
        grid = t["grid"]
        if not isinstance(grid, list) or not grid:
            c.bad("scenarios.grid", "one or more [[scenarios.grid]] tables", grid)
        scenarios = [_scenario_entry(c, i, e) for i, e in enumerate(grid, start=1)]
        names = [s.name for s in scenarios]
        dup = next((n for n in names if names.count(n) > 1), None)
        if dup is not None:
            c.fail("scenarios.grid", f"scenario name {dup!r} appears twice; names must be unique")
    for s in scenarios:
        if s.horizon <= now_year:
            where = "scenarios.table" if has_table else "scenarios.grid"
            c.fail(where, f"scenario {s.name!r} has horizon {s.horizon}; expected a year after "
                          f"climate.now_year = {now_year}")
    agreement = c.number("scenarios.agreement", t.get("agreement", DEFAULT_AGREEMENT), gt=0, le=1)
    return ScenarioSection(table, float(agreement)), scenarios


def _habitat(c: _Checker, doc, needed: bool) -> HabitatSection | None:
    t = c.table(doc, "habitat", _HABITAT, required=needed, why=" (needed when outputs.reach = true)")
    if t is None:
        return None
    path = c.file("habitat.path", c.required(t, "habitat", "path", "a habitat or land-cover raster"),
                  what="a habitat or land-cover raster")
    classes = t.get("classes")
    classes = None if classes is None else c.file("habitat.classes", classes, what="a land-cover class table")
    return HabitatSection(path, classes, c.boolean("habitat.align", t.get("align", False)))


def _dispersal(c: _Checker, doc, needed: bool) -> DispersalSection | None:
    t = c.table(doc, "dispersal", _DISPERSAL, required=needed, why=" (needed when outputs.reach = true)")
    if t is None:
        return None
    kernel = c.string("dispersal.kernel", t.get("kernel", "exponential"), choices=KERNEL_KINDS)
    replicates = c.number("dispersal.replicates", t.get("replicates", 0), integer=True, ge=0)
    dist = c.required(t, "dispersal", "mean_distance_km", "a number > 0 (km per step), or [low, high]")
    dist_range = None
    if isinstance(dist, list):
        if len(dist) != 2:
            c.bad("dispersal.mean_distance_km", "a number > 0, or two numbers [low, high]", dist)
        lo = c.number("dispersal.mean_distance_km[1]", dist[0], gt=0)
        hi = c.number("dispersal.mean_distance_km[2]", dist[1], gt=0)
        if lo > hi:
            c.fail("dispersal.mean_distance_km", f"expected [low, high] with low <= high, got {dist}")
        dist_range = (float(lo), float(hi))
        mean = (dist_range[0] + dist_range[1]) / 2.0
    else:
        mean = float(c.number("dispersal.mean_distance_km", dist, gt=0))
    shape = t.get("shape")
    if kernel == "2dt":
        if shape is None:
            c.fail("dispersal.shape", "missing; the 2dt kernel needs a shape > 1.5 (its mean distance is "
                                      "infinite for shape <= 1.5)")
        shape = float(c.number("dispersal.shape", shape, gt=1.5))
    elif shape is not None:
        c.fail("dispersal.shape", f"applies only to kernel = '2dt', got shape = {_show(shape)} with "
                                  f"kernel = {kernel!r}; remove it")
    start = t.get("start")
    start = None if start is None else c.file("dispersal.start", start, what="records or an occupancy raster")
    return DispersalSection(
        kernel=kernel, mean_distance_km=mean, mean_distance_range_km=dist_range, shape=shape,
        step_years=float(c.number("dispersal.step_years", t.get("step_years", 1.0), gt=0)),
        rate=float(c.number("dispersal.rate", t.get("rate", 1.0), gt=0)),
        persistence_years=float(c.number("dispersal.persistence_years", t.get("persistence_years", 0.0), ge=0)),
        replicates=replicates,
        start=start,
        counterfactual=c.boolean("dispersal.counterfactual", t.get("counterfactual", True)),
    )


def _check_step_span(c: _Checker, step_years: float, now_year: float, last_horizon: int) -> None:
    """A dispersal step longer than the whole span would take no step before the last horizon.

    Checked here, with the study's own key names, so the run stops before any model is fitted
    (:func:`envelope.reach.check_timing` checks the same for the command line).
    """
    span = last_horizon - now_year
    if step_years > span + 1e-9:
        c.fail("dispersal.step_years", f"expected at most {span:g} (the years from climate.now_year = "
                                       f"{now_year:g} to the last horizon {last_horizon}), got {step_years:g}")


def _outputs(c: _Checker, doc) -> OutputsSection:
    t = c.table(doc, "outputs", _OUTPUTS) or {}
    flags = {k: c.boolean(f"outputs.{k}", t.get(k, True)) for k in _OUTPUTS if k != "format"}
    return OutputsSection(**flags, format=c.string("outputs.format", t.get("format", "tif"), choices=OUTPUT_FORMATS))


def _compute(c: _Checker, doc) -> ComputeSection:
    t = c.table(doc, "compute", _COMPUTE) or {}
    address = t.get("scheduler")
    if address is not None:
        expected = "a dask scheduler address scheme://host:port, e.g. 'tcp://127.0.0.1:8786'"
        m = _ADDRESS.match(address) if isinstance(address, str) else None
        if m is None or not 0 < int(m.group(2)) < 65536:
            c.bad("compute.scheduler", expected, address)
    return ComputeSection(address)


# --------------------------------------------------------------------------- loading
#: A study file is a few kilobytes of settings; anything this large is some other file.
MAX_STUDY_BYTES = 10 * 2**20

def read_toml(path) -> dict:
    """Parse a TOML file; InputError ``"<file>: not valid TOML (line N: ...)"`` when it is not."""
    path = Path(path)
    if path.exists() and not path.is_file():  # a device (/dev/zero) or a pipe: never read whole
        raise InputError(f"{path}: not a regular file; expected a study file (TOML)")
    if path.is_file() and path.stat().st_size > MAX_STUDY_BYTES:
        raise InputError(f"{path}: {path.stat().st_size:,} bytes is too large for a study file "
                         f"(at most {MAX_STUDY_BYTES:,}); expected a TOML study file")
    try:
        text = path.read_bytes().decode("utf-8")
    except FileNotFoundError:
        raise InputError(f"{path}: study file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: cannot read the study file ({exc}); expected a UTF-8 TOML file") from None
    try:
        return tomllib.loads(text)
    except RecursionError:
        raise InputError(f"{path}: not a study file: arrays or tables nested too deeply for the TOML reader; "
                         "expected the tables of docs/study-file.md") from None
    except tomllib.TOMLDecodeError as exc:
        m = _TOML_WHERE.match(str(exc))
        detail = f"line {m['line']}: {m['msg']} at column {m['col']}" if m else str(exc)
        raise InputError(f"{path}: not valid TOML ({detail})") from None


def load_study(path) -> Study:
    """Read and validate a study file; nothing is computed, no grid is opened.

    Every key is checked before any work starts: unknown keys (with the closest allowed
    one), wrong types (booleans are not numbers), values out of range, missing required
    keys and missing files. Relative paths are resolved against the study file's folder
    (scenario paths in a scenario CSV against the CSV's folder). The schema, defaults and
    an example are in ``docs/study-file.md``.

    Parameters
    ----------
    path : str or path-like
        The study file (TOML).

    Returns
    -------
    Study
        Frozen settings, one dataclass per table; ``Study.scenarios`` lists the
        :class:`envelope.io.tables.Scenario` rows; ``Study.to_dict()`` gives them as JSON.

    Raises
    ------
    InputError
        One line naming the file, the dotted key (e.g. ``dispersal.mean_distance_km``), the
        value found and what is allowed.

    References
    ----------
    TOML v1.0.0, https://toml.io/en/v1.0.0 (the file format; parsed by :mod:`tomllib`).

    Examples
    --------
    >>> study = load_study("sample_grids/study.toml")  # doctest: +SKIP
    >>> study.model.methods, len(study.scenarios)  # doctest: +SKIP
    (('pointprocess',), 12)
    """
    source = Path(path)
    doc = read_toml(source)
    file = Path(_normalise(source))
    c = _Checker(source, file.parent)
    c.keys(doc, "", _TOP)
    # outputs first: whether [habitat] and [dispersal] are required depends on outputs.reach
    outputs = _outputs(c, doc)
    study = _study(c, doc)
    records = _records(c, doc)
    climate = _climate(c, doc)
    model = _model(c, doc)
    scenario_set, scenarios = _scenarios(c, doc, climate.now_year)
    habitat = _habitat(c, doc, outputs.reach)
    dispersal = _dispersal(c, doc, outputs.reach)
    if dispersal is not None and dispersal.start is None:
        dispersal = replace(dispersal, start=records.path)
    if dispersal is not None and scenarios:
        _check_step_span(c, dispersal.step_years, climate.now_year, max(s.horizon for s in scenarios))
    from envelope.study.observed import margins_section

    return Study(file, study, records, climate, model, scenario_set, scenarios, habitat, dispersal,
                 outputs, _compute(c, doc), _region(c, doc), margins_section(c, doc))
