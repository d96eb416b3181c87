"""Options the testing commands refuse before anything is read or connected: a negative or
non-finite settling wait, a wait together with settling verification, a serial number with
a space inside.  argparse ends a usage error with exit status 2 (Python library reference,
argparse, ``ArgumentParser.error``); stageproof's own refusals end the same way."""

from __future__ import annotations

import pytest

from harness.cli.main import main
from harness.errors import ValueParseError
from harness.run.runner import validate_serial
from tests.support.bench import BOARD_FILE, FIXTURE_FILE

FILES = ["--station", "nowhere.toml", "--fixture", str(FIXTURE_FILE), "--board", str(BOARD_FILE)]


def _usage_error(capsys, argv: list[str]) -> str:
    with pytest.raises(SystemExit) as info:
        main(argv)
    err = capsys.readouterr().err
    assert info.value.code == 2, err
    return err


@pytest.mark.parametrize("command", ["run", "line", "characterize"])
@pytest.mark.parametrize("wait", ["-1", "-0.001", "nan", "inf"])
def test_settle_wait_must_be_finite_and_not_negative(capsys, command, wait):
    serial = ["--serial", "SN-1"] if command != "line" else []
    err = _usage_error(capsys, [command, *FILES, *serial, "--settle-wait", wait])
    assert "--settle-wait" in err and "0 or more seconds" in err, err


@pytest.mark.parametrize("command", ["run", "line"])
def test_settle_wait_and_verify_settling_exclude_each_other(capsys, command):
    serial = ["--serial", "SN-1"] if command != "line" else []
    argv = [command, *FILES, *serial, "--settle-wait", "0", "--verify-settling"]
    err = _usage_error(capsys, argv)
    assert "not allowed with argument" in err and "--verify-settling" in err, err


@pytest.mark.parametrize("serial", ["SN 1", "SN\u00a01", "SN\t1"])
def test_serial_with_a_space_is_refused(capsys, serial):
    """U+0020, U+00A0 (no-break space) and TAB are white space (Unicode Character
    Database, White_Space property); none may sit inside a serial number."""
    code = main(["run", *FILES, "--serial", serial])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1, err
    assert "serial number has a space" in err or "control character" in err, err
    with pytest.raises(ValueParseError):
        validate_serial(serial)


def test_serial_padding_is_not_inside():
    assert validate_serial("  SN-1 ") == "SN-1"
