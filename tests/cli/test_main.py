"""The root command: version, help with examples, error handling contract."""

import click
from click.testing import CliRunner

import envelope
from envelope.cli import main as main_mod
from envelope.cli.main import cli
from envelope.errors import InputError


def test_version():
    result = CliRunner().invoke(cli, ["--version"])
    assert result.exit_code == 0
    assert envelope.__version__ in result.output


def test_help_has_examples():
    result = CliRunner().invoke(cli, ["--help"])
    assert result.exit_code == 0
    assert "$ envelope" in result.output


def test_library_error_is_one_line_and_exit_2(monkeypatch):
    @click.command()
    def boom():
        raise InputError("grid.tif: band 3 has no description\n(expected a variable name)")

    monkeypatch.setitem(main_mod.COMMANDS, "boom", "tests_fake:boom")
    monkeypatch.setattr(main_mod, "_module_exists", lambda target: True)
    real_import = main_mod.importlib.import_module
    monkeypatch.setattr(main_mod.importlib, "import_module",
                        lambda name: type("M", (), {"boom": boom}) if name == "tests_fake" else real_import(name))
    result = CliRunner().invoke(cli, ["boom"])
    assert result.exit_code == 2
    assert result.output.strip() == "Error: grid.tif: band 3 has no description (expected a variable name)"

    debug = CliRunner().invoke(cli, ["--debug", "boom"])
    assert isinstance(debug.exception, InputError)  # --debug lets the traceback through


def test_unknown_command_is_usage_error():
    result = CliRunner().invoke(cli, ["no-such-command"])
    assert result.exit_code == 2
    assert "No such command" in result.output


def test_every_command_help_has_examples_each_on_its_own_lines():
    # Common practice, no source: each command's --help shows examples; a continued example line
    # ends in a backslash (a lone backslash in a docstring would join the lines with a run of spaces)
    import re

    for name in main_mod.COMMANDS:
        result = CliRunner().invoke(cli, [name, "--help"])
        assert result.exit_code == 0, name
        assert "$ envelope " + name in result.output, name
        for line in result.output.splitlines():
            assert not re.search(r"\S {4,}--", line.strip()), f"{name}: {line.strip()}"
        # click prints help text as written: a doubled percent sign (argparse escaping) shows as "%%"
        assert "%%" not in result.output, name
