"""First use of the command line: every option explains itself, global flags work anywhere,
options are listed in reading order (common practice for command-line tools)."""

from __future__ import annotations

import click
import pytest

from locate.cli import cli
from locate.workflows.demo_data import demo_dir
from tests.cli_helpers import run


def _options():
    for name, cmd in sorted(cli.commands.items()):
        for p in cmd.params:
            if isinstance(p, click.Option):
                yield name, p


@pytest.mark.parametrize("name,option", [(n, p) for n, p in _options()],
                         ids=[f"{n}:{p.opts[-1]}" for n, p in _options()])
def test_every_option_of_every_command_has_help(name, option):
    assert option.help and len(option.help.split()) >= 3, f"tdoa {name} {option.opts}"


def test_every_command_has_a_one_line_summary():
    for name, cmd in cli.commands.items():
        assert cmd.get_short_help_str(80).strip(), name


@pytest.mark.parametrize("flag", ["-q", "--quiet"])
def test_quiet_works_after_the_subcommand(flag):
    site = demo_dir() / "yard.toml"
    loud = run(["check", site])
    quiet = run(["check", site, flag])
    assert loud[0] == quiet[0] == 0
    assert loud[1].strip() and not quiet[1].strip()


def test_debug_works_after_the_subcommand(tmp_path):
    code, _, err = run(["check", tmp_path / "missing.toml", "--debug"])
    assert code == 2
    assert "Traceback" in err and "missing.toml" in err.splitlines()[-1]
    code, _, err = run(["check", tmp_path / "missing.toml"])
    assert code == 2 and "Traceback" not in err and len(err.strip().splitlines()) == 1


def test_from_is_listed_before_to_and_solve_air_before_solve_wind():
    text = cli.commands["fix"].get_help(click.Context(cli.commands["fix"]))
    assert text.index("--from") < text.index("--to ")
    assert text.index("--solve-air") < text.index("--solve-wind")
