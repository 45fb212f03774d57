"""The command line itself: help for every command, version, usage errors."""

from __future__ import annotations

import pytest
from click.testing import CliRunner

from screener import __version__
from screener.cli import main

COMMANDS = sorted(main.commands)


def test_every_documented_command_exists():
    # the commands listed in the module docstring of screener.cli
    assert {"run", "check", "demo", "debrief", "reproduce"} <= set(COMMANDS)


@pytest.mark.parametrize("command", [None] + COMMANDS)
def test_help_runs_without_warnings(command):
    # pytest turns warnings into errors, so a duplicated option (click warns "The
    # parameter ... is used more than once") fails here
    args = ["--help"] if command is None else [command, "--help"]
    result = CliRunner().invoke(main, args)
    assert result.exit_code == 0, result.output
    assert "Usage:" in result.output
    if command is not None:
        assert f" {command} " in result.output.splitlines()[0] + " "


@pytest.mark.parametrize("command", COMMANDS)
def test_options_are_not_declared_twice(command):
    opts = [o for p in main.commands[command].params for o in p.opts]
    assert len(opts) == len(set(opts)), opts


def test_version():
    result = CliRunner().invoke(main, ["--version"])
    assert result.exit_code == 0 and __version__ in result.output


@pytest.mark.parametrize(
    "args",
    [
        ["run"],  # PROJECT missing
        ["run", "p.toml"],  # --out missing
        ["nosuchcommand"],
        ["demo", "--out", "x", "--size", "huge"],
    ],
)
def test_usage_errors_exit_2(args):
    result = CliRunner().invoke(main, args)
    assert result.exit_code == 2
    assert "Traceback" not in result.output


def test_demo_refuses_an_existing_folder(tmp_path):
    out = tmp_path / "demo"
    out.mkdir()
    result = CliRunner().invoke(main, ["demo", "--out", str(out), "--size", "small"])
    assert result.exit_code == 2 and "--overwrite" in result.output
    assert list(out.iterdir()) == []
