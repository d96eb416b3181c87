"""The command table: every sub-command module exists and registers itself; a missing one
is an import error, never a command silently left out of ``--help``."""

from __future__ import annotations

import pytest

from harness.cli import main as cli_main


def test_help_lists_every_command(capsys):
    with pytest.raises(SystemExit) as exc:
        cli_main.main(["--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    for name in cli_main.COMMANDS:
        assert name in out, name


def test_a_missing_command_module_is_an_error(monkeypatch):
    monkeypatch.setattr(cli_main, "COMMANDS", (*cli_main.COMMANDS, "nonexistent"))
    with pytest.raises(ModuleNotFoundError, match=r"harness\.cli\.cmd_nonexistent"):
        cli_main.build_parser()
