"""Outputs follow the user's umask, as files made by ``open()`` do (POSIX creat(2): mode & ~umask)."""

import os
import stat

import pytest
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.study.demo import demo_dir

DEMO = demo_dir()


@pytest.fixture
def umask():
    """Set the process umask for one test and restore it after."""
    saved = os.umask(0o022)
    os.umask(saved)

    def set_mask(mask):
        os.umask(mask)

    yield set_mask
    os.umask(saved)


@pytest.mark.skipif(os.name != "posix", reason="permission bits are POSIX")
@pytest.mark.parametrize("mask", [0o022, 0o027])
def test_every_output_of_fit_and_project_follows_the_umask(tmp_path, umask, mask):
    # Source: POSIX open(2)/creat(2): a new file gets 0666 & ~umask; the same rule for every kind
    # of output (model file, JSON, CSV, raster)
    umask(mask)
    model, summary = tmp_path / "m.envm", tmp_path / "fit.json"
    fit = CliRunner().invoke(cli, ["fit", "--presences", str(DEMO / "presences.csv"), "--climate",
                                   str(DEMO / "baseline.tif"), "--background", "500", "--folds", "3",
                                   "--method", "envelope", "--out", str(model), "--summary", str(summary)])
    assert fit.exit_code == 0, fit.output
    proj = CliRunner().invoke(cli, ["project", str(model), "--climate", str(DEMO / "baseline.tif"),
                                    "--out", str(tmp_path / "now.tif")])
    assert proj.exit_code == 0, proj.output
    files = sorted(p for p in tmp_path.iterdir() if p.is_file())
    assert {p.suffix for p in files} >= {".envm", ".json", ".csv", ".tif"}
    for p in files:
        assert stat.S_IMODE(p.stat().st_mode) == 0o666 & ~mask, p.name
