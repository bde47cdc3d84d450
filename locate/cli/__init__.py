"""The ``tdoa`` command line (also ``python -m locate``): click commands only.

Each command parses its options, calls :mod:`locate.workflows` and the core, writes its outputs
atomically and prints a short summary.  Problems with the input are one line on stderr and exit
code 2 (1 when the input is valid but nothing usable was found); ``--debug`` shows the traceback.

Modules: :mod:`~locate.cli.common` (shared option parsing, screen output, output files),
one module per command (``check``, ``fix`` with ``sweep``, ``events``, ``level``, ``plan``,
``sync``, ``report``, ``maps`` for ``track`` and ``map``, ``batch``, ``demo``), and
:mod:`~locate.cli.field` (the field-survey options of ``fix``).  This module holds the group,
registers the commands and is the console entry point.  Nothing in :mod:`locate` imports it.
"""

from __future__ import annotations

import sys
import traceback

import click

from locate import __version__
from locate.cli.batch import batch
from locate.cli.check import check
from locate.cli.common import as_options
from locate.cli.demo import demo
from locate.cli.events import events
from locate.cli.fix import fix
from locate.cli.level import level
from locate.cli.maps import map_command, track
from locate.cli.plan import plan
from locate.cli.report import report
from locate.cli.sync import sync
from locate.errors import TdoaError

__all__ = ["cli", "main"]



@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="tdoa")
@click.option("--debug", is_flag=True, help="Show a traceback on error.")
@click.option("--quiet", "-q", is_flag=True, help="Print nothing but warnings and errors.")
@click.pass_context
def cli(ctx, debug, quiet):
    """Find where a sound came from, using time differences of arrival at synchronised
    microphones (see docs/walkthrough.md)."""
    ctx.ensure_object(dict)
    ctx.obj.update(debug=debug, quiet=quiet)


for _command in (check, fix, events, level, plan, demo, sync, report, track, map_command,
                 batch):
    cli.add_command(_command)


def main(argv=None):
    """Console entry point: turns user-facing errors into one line and an exit code."""
    args = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in args
    try:
        cli.main(args=args, prog_name="tdoa", standalone_mode=False)
    except click.exceptions.Abort:
        click.echo("tdoa: interrupted; no partial result was written", err=True)
        sys.exit(130)
    except click.exceptions.ClickException as exc:
        exc.show()
        sys.exit(exc.exit_code)
    except TdoaError as exc:
        as_options(exc)
        if debug:
            traceback.print_exc()
        click.echo(f"tdoa: error: {exc}", err=True)
        sys.exit(exc.exit_code)
    except KeyboardInterrupt:
        click.echo("tdoa: interrupted; no partial result was written", err=True)
        sys.exit(130)
    except click.exceptions.Exit as exc:
        sys.exit(exc.exit_code)
    sys.exit(0)
