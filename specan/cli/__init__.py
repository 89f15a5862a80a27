"""specan's command line: a thin layer over the Python API.

Each subcommand lives in its own module here and only parses, calls one API
function and prints. Errors go to stderr as one line with a non-zero exit
status; ``--debug`` shows the traceback.
"""

import importlib
import sys

import click

from ..errors import SpecanError

# subcommand name -> module in this package defining a click command called `command`
SUBCOMMANDS = {
    "inspect": "inspect",
    "lines": "lines",
    "velocity": "velocity",
    "calibrate": "calibrate",
    "classify": "classify",
    "run": "run",
}


class _LazyGroup(click.Group):
    """Imports a subcommand's module only when it is used (keeps start-up fast)."""

    def list_commands(self, ctx):
        return [name for name, mod in SUBCOMMANDS.items() if self._load(mod) is not None]

    def get_command(self, ctx, name):
        mod = SUBCOMMANDS.get(name)
        return None if mod is None else self._load(mod)

    @staticmethod
    def _load(mod):
        try:
            module = importlib.import_module(f"{__name__}.{mod}")
        except ModuleNotFoundError as exc:
            if exc.name and exc.name.endswith(f"cli.{mod}"):
                return None  # subcommand not written yet
            raise
        return getattr(module, "command", None)


@click.group(cls=_LazyGroup)
@click.option("--debug", is_flag=True, help="Show full tracebacks on errors.")
@click.version_option(package_name="specan")
@click.pass_context
def cli(ctx, debug):
    """specan: analyse stellar absorption-line spectra."""
    ctx.ensure_object(dict)
    ctx.obj["debug"] = debug


def main(argv=None):
    """Entry point of the ``specan`` console script."""
    debug = "--debug" in (argv if argv is not None else sys.argv[1:])
    # the process's exit then skips the collections of every library object (~0.9 s after a night run)
    from ..night.heap import set_aside_at_exit

    set_aside_at_exit()
    try:
        return cli.main(args=argv, prog_name="specan", standalone_mode=False) or 0
    except click.exceptions.Abort:
        click.echo("specan: aborted", err=True)
        return 130
    except click.ClickException as exc:
        exc.show()
        return exc.exit_code
    except SpecanError as exc:
        if debug:
            raise
        click.echo(f"specan: error: {exc}", err=True)
        return 2
    except Exception as exc:  # noqa: BLE001 - last resort: one line, not a traceback
        if debug:
            raise
        click.echo(f"specan: internal error: {type(exc).__name__}: {exc} (rerun with --debug "
                   "for the traceback and please report it)", err=True)
        return 3
