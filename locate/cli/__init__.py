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

import contextlib
import os
import sys
import traceback

# The commands' matrix products and factorisations are small (pairs x pairs, scenarios x
# bins): OpenBLAS's own threads cost more than they give there, and on a shared machine far
# more (the ground-reflection model of one window: 0.16 s wall single-threaded against
# 0.8-1.2 s with the default threads, 2 cores under load).  Set before numpy is loaded (it is
# not, yet: the commands import it lazily); a value the user set is kept.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import click  # noqa: E402

from locate import __version__  # noqa: E402
from locate.cli.batch import batch
from locate.cli.check import check
from locate.cli.common import as_options, os_error_line, printable
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


GLOBAL_FLAGS = ("-q", "--quiet", "--debug")


def _globals_first(args):
    """``tdoa fix site.toml -q`` as ``tdoa -q fix site.toml``: the group's flags may stand
    anywhere on the line (before ``--``, which ends the options)."""
    end = args.index("--") if "--" in args else len(args)
    flags = [a for a in args[:end] if a in GLOBAL_FLAGS]
    rest = [a for a in args[:end] if a not in GLOBAL_FLAGS]
    return flags + rest + args[end:]


def main(argv=None):
    """Console entry point: the one boundary between the program and the user's terminal.

    A problem with the input is one line naming the file and the field, exit code 2 (1 when
    the input is valid but nothing usable was found); the operating system's refusals (read-only
    folder, full disk, a name too long, a folder where a file should be, a symlink loop), a
    recording libsndfile cannot decode, too little memory or too deep nesting are one line
    naming the file and what to do; anything else is "internal error", exit code 1.  Never a
    traceback, unless ``--debug`` is given.
    """
    args = _globals_first(list(sys.argv[1:] if argv is None else argv))
    debug = "--debug" in args

    def fail(line, code):
        if debug:
            traceback.print_exc()
        click.echo(printable(f"tdoa: error: {line}"), err=True)
        sys.exit(code)

    try:
        cli.main(args=args, prog_name="tdoa", standalone_mode=False)
        sys.stdout.flush()  # a reader that went away shows here, not at interpreter exit
    except click.exceptions.Abort as exc:
        click.echo("tdoa: interrupted; no partial result was written", err=True)
        sys.exit(143 if type(exc.__cause__).__name__ == "Terminated" else 130)
    except click.exceptions.UsageError as exc:
        hint = f" (see tdoa {exc.ctx.info_name} --help)" if exc.ctx and exc.ctx.parent else ""
        fail(" ".join(exc.format_message().split()) + hint, exc.exit_code)
    except click.exceptions.ClickException as exc:
        exc.show()
        sys.exit(exc.exit_code)
    except TdoaError as exc:
        as_options(exc)
        fail(str(exc), exc.exit_code)
    except KeyboardInterrupt as exc:
        click.echo("tdoa: interrupted; no partial result was written", err=True)
        sys.exit(143 if type(exc).__name__ == "Terminated" else 130)
    except click.exceptions.Exit as exc:
        sys.exit(exc.exit_code)
    except BrokenPipeError:  # the reader went away (tdoa check ... | head): stop quietly
        _quiet_stdout()
        sys.exit(1)
    except OSError as exc:
        line, code = os_error_line(exc)
        fail(line, code)
    except MemoryError:
        fail("not enough memory for this run: analyse a shorter span (--from/--to), fewer "
             "windows or fewer jobs", 2)
    except RecursionError:
        fail("the input is nested too deeply to read (a damaged or hostile file?)", 2)
    except Exception as exc:  # the last line of defence: one line, never a traceback
        if _is_libsndfile(exc):
            fail(f"a recording could not be decoded ({_first_line(exc)}): the file is damaged "
                 "or not audio; export it again from the recorder", 2)
        fail(f"internal error: {type(exc).__name__}: {_first_line(exc)} (run with --debug "
             "for the traceback and report it)", 1)
    sys.exit(0)


def _quiet_stdout():
    """Point stdout at /dev/null so that the interpreter's last flush cannot fail again."""
    with contextlib.suppress(OSError, ValueError, AttributeError):
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())


def _first_line(exc) -> str:
    lines = str(exc).strip().splitlines()
    return " ".join(lines[0].split()) if lines else type(exc).__name__


def _is_libsndfile(exc) -> bool:
    module = type(exc).__module__ or ""
    return module.startswith("soundfile") or type(exc).__name__ == "LibsndfileError"
