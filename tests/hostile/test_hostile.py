"""The bad-input corpus: every case in cases.toml must end as one clear line, exit status 2, nothing left behind.

Each case runs one command (click's CliRunner, in process) on small grids built once per
session, and asserts: exit status 2; no traceback; at most two non-blank lines of output;
the words the case expects (the file, flag or key named, what was wrong); no new file in
the case's output folder; and no existing file changed (SHA-256 before and after).

Faults the operating system would give are simulated with monkeypatch (tests run as any
user, root included, on any disk): ``readonly`` makes the output folder refuse writes
(EACCES), ``enospc`` makes every write into it fail with ENOSPC (a full disk).
Common practice, no source: the expected words are this project's own contract
(DEVELOPERS.md, "Errors"); issue 19 lists the cases that once failed.
"""

from __future__ import annotations

import builtins
import errno
import hashlib
import io
import os
import shutil
import tempfile
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import rasterio
import pytest
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.study.demo import demo_dir
from tests.conftest import make_stack

CASES = tomllib.loads((Path(__file__).with_name("cases.toml")).read_text(encoding="utf-8"))["case"]
LONG_NAME = "n" * 300


# --------------------------------------------------------------------------- fixtures built once


def _write(da, path, **tags):
    from envelope.io.writing import write_raster

    write_raster(da, path, tags=tags or None)
    return path


def _invoke(args):
    result = CliRunner().invoke(cli, [str(a) for a in args])
    assert result.exit_code == 0, result.output
    return result


@pytest.fixture(scope="session")
def data(tmp_path_factory):
    """Small valid inputs of every command, and hostile files beside them (built once)."""
    d = tmp_path_factory.mktemp("hostile-data")
    climate = make_stack(nx=20, ny=15, variables=("bio1", "bio12"), seed=0)
    _write(climate, d / "climate.tif")
    _write(make_stack(nx=20, ny=15, variables=("bio1", "bio12"), seed=1), d / "future_climate.tif")
    rng = np.random.default_rng(0)
    lon = -150 + rng.uniform(0.05, 1.95, 40)
    lat = 45 - rng.uniform(0.05, 1.45, 40)
    records = pd.DataFrame({"occurrenceID": [f"r{i}" for i in range(40)], "decimalLongitude": lon.round(5),
                            "decimalLatitude": lat.round(5), "occurrenceStatus": "present"})
    records.to_csv(d / "records.csv", index=False)
    _invoke(["fit", "--presences", d / "records.csv", "--climate", d / "climate.tif", "--method", "envelope",
             "--background", "100", "--folds", "3", "--cv", "random", "--out", d / "model.envm"])
    _invoke(["project", d / "model.envm", "--climate", d / "climate.tif", "--out", d / "now.tif",
             "--mess", d / "mess.tif"])
    _invoke(["project", d / "model.envm", "--climate", d / "future_climate.tif", "--out", d / "future.tif"])
    with rasterio.open(d / "future.tif") as src:  # the same map as a percentage, as some tools write it
        profile, values = src.profile, src.read()
    with rasterio.open(d / "future_percent.tif", "w", **profile) as dst:
        dst.write(values * 100)
    habitat = make_stack(nx=20, ny=15, variables=("habitat",), seed=2).isel(variable=0, drop=True)
    _write(((habitat - habitat.min()) / (habitat.max() - habitat.min())).rename("habitat"), d / "habitat.tif")
    candidates = (habitat > 0.5).astype("uint8").rename("candidates")
    _write(candidates.rio.write_crs("EPSG:4326"), d / "candidates.tif")
    pd.DataFrame({"name": ["s1"], "pathway": ["high"], "climate_model": ["m1"], "horizon": [2050],
                  "path": [str(d / "future_climate.tif")]}).to_csv(d / "scenarios.csv", index=False)
    pd.DataFrame({"name": ["s1"], "pathway": ["high"], "climate_model": ["m1"], "horizon": [2050],
                  "path": [str(d / "future.tif")]}).to_csv(d / "suitability.csv", index=False)
    shutil.copy(demo_dir() / "landcover_classes.csv", d / "classes.csv")

    # hostile files
    lines = (d / "records.csv").read_text().splitlines()
    broken = [lines[0]] + [line.replace(",", ',"', 1) if i % 4 == 0 else line for i, line in enumerate(lines[1:])]
    (d / "broken_quotes.csv").write_text("\n".join(broken) + "\n")
    (d / "semicolons.csv").write_text("\n".join(line.replace(",", ";", 2) if i else line
                                                for i, line in enumerate(lines)) + "\n")
    (d / "huge_fields.csv").write_text(lines[0] + "\n" + "".join(
        f"r{i},{'9' * 140_000},45.0,present\n" for i in range(3)))
    (d / "binary.csv").write_bytes(b"decimalLongitude,decimalLatitude\n" + bytes(range(256)) * 4)
    (d / "header_only.csv").write_text(lines[0] + "\n")
    (d / "not_a_zip.zip").write_text("not a zip")
    (d / "swapped.csv").write_text("decimalLongitude,decimalLatitude\n" + "".join(
        f"{y:.5f},{x:.5f}\n" for x, y in zip(lon, lat)))
    (d / "no_coords.csv").write_text("id,name\n1,a\n2,b\n")
    (d / "deep.toml").write_text("a = " + "[" * 5000 + "]" * 5000 + "\n")
    (d / "bad_syntax.toml").write_text("[study\nname = 'x'\n")
    study = (demo_dir().parent / "study.toml").read_text()
    demo = str(demo_dir())
    study = study.replace('"demo/', f'"{demo}/')
    (d / "study.toml").write_text(study)
    (d / "unknown_key.toml").write_text(study.replace("[model]\n", "[model]\nmethod = 'brt'\n", 1))
    (d / "negative_seed.toml").write_text(study.replace("seed = 0", "seed = -1", 1))
    (d / "missing_records.toml").write_text(study.replace(f"{demo}/presences.csv", f"{demo}/nothere.csv", 1))
    (d / "step_past_horizon.toml").write_text(study.replace("step_years = 5", "step_years = 1e300", 1))
    (d / "layer_band_missing.toml").write_text(study.replace("now_year = 2020\n", "now_year = 2020\n[climate.layers]\n"
                                                             f"bio5 = \"{demo}/baseline.tif:9\"\n", 1))
    (d / "layer_other_grid.toml").write_text(study.replace("now_year = 2020\n", "now_year = 2020\n[climate.layers]\n"
                                                           f"bio5 = \"{d}/climate.tif:1\"\n", 1))
    (d / "tiny_study.toml").write_text(f"""[study]
name = "hostile corpus"

[records]
path = "{d}/records.csv"

[climate]
baseline = "{d}/climate.tif"

[model]
methods = ["envelope"]
background = 100
folds = 3
cv = "random"

[scenarios]
table = "{d}/scenarios.csv"

[outputs]
mess = false
ensemble = false
change = false
reach = false
figures = false
report = false
""")
    (d / "deep_scenarios.toml").write_text("scenario = " + "[" * 5000 + "]" * 5000 + "\n")
    (d / "scenarios_missing_column.csv").write_text("name,pathway,horizon,path\ns1,high,2050,climate.tif\n")
    (d / "scenarios_huge_field.csv").write_text("name,pathway,climate_model,horizon,path\n"
                                                f"{'s' * 140_000},high,m1,2050,climate.tif\n")
    (d / "empty.tif").write_bytes(b"")
    (d / "not_a_raster.tif").write_text("this is not a GeoTIFF\n")
    (d / "not_a_model.envm").write_text("not a zip file\n")
    return d


# --------------------------------------------------------------------------- faults


def _under(path, folder) -> bool:
    try:
        return Path(os.path.abspath(os.fspath(path))).is_relative_to(folder)
    except TypeError:
        return False


def _readonly(monkeypatch, folder):
    """The output folder refuses writes as a read-only folder does for a non-root user (EACCES)."""
    def denied(path):
        return PermissionError(errno.EACCES, os.strerror(errno.EACCES), os.fspath(path))

    real_access, real_mkstemp, real_mkdir = os.access, tempfile.mkstemp, os.mkdir

    def access(path, mode, *a, **k):
        if mode & os.W_OK and _under(path, folder):
            return False
        return real_access(path, mode, *a, **k)

    def mkstemp(*a, dir=None, **k):
        if dir is not None and _under(dir, folder):
            raise denied(dir)
        return real_mkstemp(*a, dir=dir, **k)

    def mkdir(path, *a, **k):
        if _under(path, folder):
            raise denied(path)
        return real_mkdir(path, *a, **k)

    monkeypatch.setattr(os, "access", access)
    monkeypatch.setattr(tempfile, "mkstemp", mkstemp)
    monkeypatch.setattr(os, "mkdir", mkdir)


class _FullDisk(io.RawIOBase):
    def writable(self):
        return True

    def write(self, b):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))


def _enospc(monkeypatch, folder):
    """Every write into the output folder fails with ENOSPC, as on a full disk."""
    from envelope.io import blocks

    real_open = builtins.open

    def full_open(file, mode="r", *a, **k):
        if isinstance(file, (str, os.PathLike)) and _under(file, folder) and any(c in mode for c in "wax+"):
            handle = real_open(file, mode, *a, **k)  # the file is created, as on a real disk
            handle.write = _FullDisk().write
            return handle
        return real_open(file, mode, *a, **k)

    def full_window(self, key, value):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(builtins, "open", full_open)
    monkeypatch.setattr(io, "open", full_open)
    monkeypatch.setattr(blocks.WindowWriter, "__setitem__", full_window)


FAULTS = {"readonly": _readonly, "enospc": _enospc}


# --------------------------------------------------------------------------- per-case set-up


def _setup(name, out, data):
    if name == "existing":
        shutil.copy(data / "now.tif", out / "exists.tif")
        (out / "exists.json").write_text("{}\n")
        (out / "exists.csv").write_text("a,b\n1,2\n")
        (out / "exists.envm").write_bytes(b"model")
    elif name == "loop":
        os.symlink(out / "loop-b.tif", out / "loop-a.tif")
        os.symlink(out / "loop-a.tif", out / "loop-b.tif")
    elif name == "file_as_folder":
        (out / "afile").write_text("x\n")
    elif name:
        raise AssertionError(f"unknown set-up {name!r}")


def _fill(value, data, out):
    return (str(value).replace("{data}", str(data)).replace("{out}", str(out)).replace("{demo}", str(demo_dir()))
            .replace("{long}", LONG_NAME))


def _snapshot(*folders):
    state = {}
    for folder in folders:
        for root, dirs, files in os.walk(folder):
            for name in dirs + files:
                p = Path(root) / name
                if p.is_symlink() or p.is_dir():
                    state[str(p)] = "link" if p.is_symlink() else "dir"
                else:
                    state[str(p)] = hashlib.sha256(p.read_bytes()).hexdigest()
    return state


@pytest.mark.parametrize("case", CASES, ids=[c["id"] for c in CASES])
def test_hostile_input(case, data, tmp_path, monkeypatch):
    out = tmp_path / "out"
    out.mkdir()
    _setup(case.get("setup", ""), out, data)
    args = [_fill(a, data, out) for a in case["args"]]
    before = _snapshot(data, out)
    monkeypatch.chdir(out)
    if case.get("fault"):
        FAULTS[case["fault"]](monkeypatch, out)
    result = CliRunner().invoke(cli, args)
    monkeypatch.undo()
    text = result.output
    assert result.exit_code == 2, f"exit {result.exit_code}: {text}\n{result.exception!r}"
    assert result.exception is None or isinstance(result.exception, SystemExit), repr(result.exception)
    assert "Traceback" not in text
    lines = [line for line in text.splitlines() if line.strip()]
    assert 1 <= len(lines) <= 2, text
    for word in case["expect"]:
        assert _fill(word, data, out).lower() in " ".join(text.split()).lower(), f"{word!r} not in: {text}"
    after = _snapshot(data, out)
    assert sorted(set(after) - set(before)) == [], "left behind"
    changed = [p for p in before if after.get(p) != before[p]]
    assert changed == [], "changed or removed"


def test_corpus_covers_every_command():
    # Common practice, no source: at least 80 cases, and every command has some
    from envelope.cli.main import COMMANDS

    assert len(CASES) >= 80
    assert {c["args"][0] for c in CASES} == set(COMMANDS)
    assert len({c["id"] for c in CASES}) == len(CASES)
