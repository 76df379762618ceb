"""A wheel built from the checkout carries the demo study: `pip install .` then `envelope demo` finds its data."""

import json
import os
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def installed(tmp_path_factory):
    """The wheel of this checkout, built without network (the venv's setuptools) and
    installed into a bare folder that is put first on the path of a child interpreter."""
    pytest.importorskip("setuptools")
    pytest.importorskip("wheel")
    root = tmp_path_factory.mktemp("wheel")
    build = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "-q",
                            "-w", str(root / "dist"), str(REPO)], capture_output=True, text=True, cwd=root)
    if build.returncode != 0:
        pytest.skip(f"cannot build a wheel here: {build.stderr.strip().splitlines()[-1:]}")
    wheel = next((root / "dist").glob("envelope-*.whl"))
    target = root / "site"
    subprocess.run([sys.executable, "-m", "pip", "install", "--no-deps", "--no-index", "-q", "--target",
                    str(target), str(wheel)], check=True, capture_output=True, cwd=root)
    return wheel, target, root


def test_wheel_holds_every_demo_file(installed):
    # Common practice, no source: a wheel is a zip whose member names are the installed paths
    wheel, _, _ = installed
    names = set(zipfile.ZipFile(wheel).namelist())
    demo = REPO / "sample_grids" / "demo"
    expected = {f"envelope/demo_data/demo/{p.relative_to(demo).as_posix()}" for p in demo.rglob("*") if p.is_file()}
    assert expected <= names
    assert "envelope/demo_data/study.toml" in names


def test_installed_demo_finds_its_data_outside_the_checkout(installed):
    # Common practice, no source: run from an unrelated folder with only the installed
    # package (no checkout on the path), the demo study is found in the package and loads
    _, target, root = installed
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "ENVELOPE_DEMO_DIR")}
    env["PYTHONPATH"] = str(target)
    code = ("import json, envelope; from envelope.study.demo import demo_dir; from envelope.study.schema import "
            "load_study; d = demo_dir(); s = load_study(d.parent / 'study.toml'); "
            "print(json.dumps([envelope.__file__, str(d), len(s.scenarios)]))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, cwd=root, check=True)
    module, folder, n_scenarios = json.loads(out.stdout)
    assert Path(module).is_relative_to(target) and Path(folder).is_relative_to(target)
    assert n_scenarios == 12  # Source: sample_grids/demo/scenarios.csv (12 rows)
    help_out = subprocess.run([sys.executable, "-m", "envelope.cli.main", "demo", "--help"], capture_output=True,
                              text=True, env=env, cwd=root)
    assert help_out.returncode == 0 and "envelope demo" in help_out.stdout
