"""Root ``envelope`` command: logging, --debug, lazy sub-commands, errors to one line + exit 2."""

from __future__ import annotations

import importlib
import logging
import signal
import threading

import click

from envelope import __version__
from envelope.errors import EnvelopeError, os_error_message

# command name -> "module:function"; modules are imported only when the command runs,
# so `envelope --help` stays instant (no xarray/matplotlib import).
COMMANDS = {
    "info": "envelope.cli.info:info",
    "fit": "envelope.cli.fit:fit",
    "evaluate": "envelope.cli.evaluate:evaluate",
    "inspect": "envelope.cli.inspect:inspect",
    "project": "envelope.cli.project:project",
    "change": "envelope.cli.change:change",
    "reach": "envelope.cli.reach:reach",
    "bioclim": "envelope.cli.bioclim:bioclim",
    "delta": "envelope.cli.delta:delta",
    "demo": "envelope.cli.demo:demo",
    "records": "envelope.cli.records:records",
    "run": "envelope.cli.run:run",
    "target": "envelope.cli.target:target",
    "fragmentation": "envelope.cli.fragmentation:fragmentation",
    "margins": "envelope.cli.margins:margins",
    "hindcast": "envelope.cli.hindcast:hindcast",
}

SUMMARIES = {
    "info": "Describe a grid: CRS, shape, variables, nodata share, true area.",
    "fit": "Fit and cross-validate a presence/background model.",
    "evaluate": "Score a fitted model on independent records.",
    "inspect": "Print what a model file holds.",
    "project": "Project a model onto climate grids, with MESS.",
    "change": "Classify and measure range change between two suitability maps.",
    "reach": "Habitat-gated dispersal through the transient climate.",
    "bioclim": "Compute the 19 bioclimatic variables from monthly grids.",
    "delta": "Build scenario grids by the delta (change-factor) method.",
    "demo": "Run the bundled fictional study.",
    "records": "Clean occurrence records against a grid and report drops.",
    "run": "Run a whole study from a TOML study file.",
    "target": "Rank restoration patches by the reachable range they add.",
    "fragmentation": "Habitat amount and effective mesh size by latitude band.",
    "margins": "Observed range-margin shifts between two recording periods.",
    "hindcast": "Fit on one recording period, test on the other.",
}


class LazyGroup(click.Group):
    """A group whose sub-commands are imported on first use."""

    def list_commands(self, ctx):
        return [name for name, target in COMMANDS.items() if _module_exists(target)]

    def get_command(self, ctx, name):
        target = COMMANDS.get(name)
        if target is None or not _module_exists(target):
            return None
        module_name, attr = target.split(":")
        return getattr(importlib.import_module(module_name), attr)

    def invoke(self, ctx):
        # Every failure a user can cause ends as one line on stderr and exit status 2; --debug
        # shows the traceback instead. Operating-system errors (read-only folder, full disk,
        # name too long, symlink loop) are told by their errno, naming the path.
        def debug():  # set by the root callback, which runs inside super().invoke
            return (ctx.obj or {}).get("debug")

        try:
            return super().invoke(ctx)
        except click.UsageError as exc:
            # one line for the error and one for the hint (click's own form adds the usage line)
            if debug():
                raise
            hint = ""
            if exc.ctx is not None and exc.ctx.command.get_help_option(exc.ctx) is not None:
                hint = f"Try '{exc.ctx.command_path} {exc.ctx.help_option_names[0]}' for help."
            click.echo(f"Error: {_one_line(exc.format_message())}" + (f"\n{hint}" if hint else ""), err=True)
            ctx.exit(exc.exit_code)
        except EnvelopeError as exc:
            if debug():
                raise
            click.echo(f"Error: {_one_line(exc)}", err=True)
            ctx.exit(2)
        except OSError as exc:
            if debug():
                raise
            click.echo(f"Error: {_one_line(os_error_message(exc))}", err=True)
            ctx.exit(2)
        except MemoryError:
            if debug():
                raise
            click.echo("Error: out of memory; give smaller inputs or run on a machine with more memory", err=True)
            ctx.exit(2)
        except KeyboardInterrupt as exc:  # Ctrl-C, or SIGTERM (a batch scheduler's time limit) via _stop
            if debug():
                raise
            name = exc.args[0] if isinstance(exc, Stopped) else "SIGINT"
            click.echo(f"Stopped by {name}: no half-written file is left; a study run resumes from its finished "
                       "steps when the same command is run again", err=True)
            ctx.exit(128 + int(getattr(signal, name)))

    def format_commands(self, ctx, formatter):
        rows = [(name, SUMMARIES.get(name, "")) for name in self.list_commands(ctx)]
        if rows:
            with formatter.section("Commands"):
                formatter.write_dl(rows)


def _module_exists(target: str) -> bool:
    import importlib.util

    return importlib.util.find_spec(target.split(":")[0]) is not None


@click.group(cls=LazyGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, "--version", prog_name="envelope")
@click.option("-v", "--verbose", count=True, help="More log output (-v info, -vv debug).")
@click.option("--debug", is_flag=True, help="Show full tracebacks on errors.")
@click.pass_context
def cli(ctx, verbose, debug):
    """Where will the climate suit a species, and which of those places can it reach?

    envelope fits presence/background species-distribution models to gridded climate,
    evaluates them with spatially blocked cross-validation, projects them onto scenario
    grids with novel-climate warnings, measures range change in true areas, and steps
    habitat-gated dispersal through the transient climate.

    \b
    Examples:
      $ envelope info sample_grids/demo/baseline.tif
      $ envelope fit --presences records.csv --climate baseline.tif --out model.envm
      $ envelope --debug info broken.nc
    """
    level = logging.WARNING - 10 * verbose
    logging.basicConfig(level=max(level, logging.DEBUG), format="%(levelname)s %(name)s: %(message)s")
    from envelope.cli.logsetup import route_warnings

    route_warnings()
    ctx.ensure_object(dict)
    ctx.obj["debug"] = debug
    ctx.obj["verbose"] = verbose


def _one_line(exc: Exception) -> str:
    return " ".join(str(exc).split())


class Stopped(KeyboardInterrupt):
    """A stop signal other than Ctrl-C (SIGTERM), raised in the main thread like Ctrl-C's
    KeyboardInterrupt so every atomic output removes its temporary file on the way out."""


def _stop(signum, frame):
    raise Stopped(signal.Signals(signum).name)


def main(argv=None):
    """Console entry point (``envelope``)."""
    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGTERM, _stop)
    cli.main(args=argv, prog_name="envelope")


if __name__ == "__main__":  # pragma: no cover
    main()
