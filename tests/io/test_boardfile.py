"""Board files: the demo boards load and are sound; bad boards give one clear error naming the
file, channel, stage and field, and ``stageproof limits`` exits with status 2 without a traceback.
"""

from __future__ import annotations

import pytest

from harness.cli.main import main
from harness.errors import BoardFileError
from harness.io.board import load_board
from harness.model import design_channel, validate_board
from tests.support.boards import CE_STAGE, board_text, write_board

DEMOS = ("limits/demo-twin-preamp.toml", "limits/demo-opamp-line.toml")

OPAMP_STAGE = """
[[channel]]
name = "X"
  [[channel.stage]]
  kind = "opamp_noninverting"
  name = "amp"
  opamp = "u"
  r_bias = "47k"
  r_g = "1k"
  r_f = "{r_f}"
  c_in = "4u7"
"""


@pytest.mark.parametrize("path", DEMOS)
def test_demo_boards_are_active_region_designs(path: str) -> None:
    """Both demo boards load, every BJT sits in its active region with margin (V_CE at least 1 V
    above V_CE(sat) max, I_C between 0.1 and 10 mA) and the nominal level is at least 6 dB below
    the clipping threshold (common practice for a test level)."""
    board = load_board(path)
    validate_board(board)
    for ch in board.channels:
        d = design_channel(board, ch.name)
        assert d.thd_clip_input_vrms > 2.0 * board.conditions.nominal_input_vrms
        assert d.thd_clip_input_vrms < board.conditions.safe_input_vrms
        for st, s in zip(ch.stages, d.stages, strict=True):
            if s.vc_v is not None:
                assert s.vc_v - s.ve_v > st.transistor.vce_sat_v.max + 1.0
                assert 1e-4 < s.ic_a < 1e-2


def _limits_cli(path, capsys) -> tuple[int, str]:
    status = main(["limits", str(path), "--samples", "200"])
    err = capsys.readouterr().err
    return status, err


BAD = [
    # (what, board text, location fragment, words in the reason)
    ("missing field", board_text().replace('  rc = "4k7"\n', ""), "stage[0](gain).rc", "missing"),
    (
        "unknown stage kind",
        board_text().replace('kind = "common_emitter"', 'kind = "common_base"'),
        "stage[0].kind",
        "unknown stage kind",
    ),
    ("negative resistance", board_text(rc="-4700"), "stage[0](gain).rc", "greater than zero"),
    ("zero resistance", board_text(rc="0"), "stage[0](gain).rc", "greater than zero"),
    ("unparseable value", board_text(rc="4x7"), "stage[0](gain).rc", "not a number"),
    ("tolerance over 100 %", board_text(rc="4k7 150%"), "stage[0](gain).rc", "100 %"),
    ("saturated at rest", board_text(rc="47k"), "channel.X.stage[0](gain).rc", "saturated"),
    ("cut off at rest", board_text(r1="680k", r2="1k"), "channel.X.stage[0](gain).r2", "cut off"),
    (
        "bias parts on a DC-coupled follower",
        board_text(
            CE_STAGE.replace('  c_out = "10u"\n', "")
            + '  [[channel.stage]]\n  kind = "emitter_follower"\n  name = "buf"\n'
            '  transistor = "q"\n  re = "2k2"\n  r1 = "100k"\n  c_out = "10u"\n'
        ),
        "stage[1](buf).r1",
        'r1 given on a DC-coupled follower (coupling defaults to "dc")',
    ),
    (
        "cannot drive its load",
        board_text(
            OPAMP_STAGE, negative='negative_v = "-15 0%"', load="10", nominal=0.1, r_f="20k"
        ),
        "channel.X.stage[0](amp)",
        "cannot drive its load",
    ),
]


@pytest.mark.parametrize(("what", "text", "where", "words"), BAD, ids=[b[0] for b in BAD])
def test_bad_board_names_file_channel_stage_field(
    tmp_path, capsys, what, text, where, words
) -> None:
    path = write_board(tmp_path, text, "bad.toml")
    with pytest.raises(BoardFileError) as info:
        validate_board(load_board(path))
    exc = info.value
    assert exc.path == str(path)
    assert where in (exc.location or "")
    assert words in exc.reason
    status, err = _limits_cli(path, capsys)
    assert status == 2
    assert "Traceback" not in err
    assert str(path) in err and where in err
    assert err.count("\n") == 1  # one line


def test_compute_limits_refuses_unworkable_nominal(tmp_path) -> None:
    """compute_limits raises the same BoardFileError as validate_board for a board saturated at
    rest (the run layer may call it directly)."""
    from harness.model import compute_limits

    board = load_board(write_board(tmp_path, board_text(rc="47k")), validate=False)
    with pytest.raises(BoardFileError, match=r"stage\[0\]\(gain\)\.rc"):
        compute_limits(board, samples=100)


def test_unknown_channel_and_parameter(tmp_path) -> None:
    """Asking for a channel the board lacks names the board's channels; an unknown model
    parameter override is refused with the list of known keys."""
    board = load_board(write_board(tmp_path, board_text()))
    with pytest.raises(BoardFileError, match="channels on this board: X"):
        design_channel(board, "Y")
    with pytest.raises(KeyError, match=r"gain\.r1"):
        design_channel(board, "X", params={"gain.r9": 1.0})


def test_missing_coupling_capacitor(tmp_path) -> None:
    """A divider-biased first stage with no input capacitor would have its bias shorted by the
    source: refused naming c_in."""
    text = board_text(CE_STAGE.replace('  c_in = "10u"\n', ""))
    with pytest.raises(BoardFileError, match=r"stage\[0\]\(gain\)\.c_in"):
        load_board(write_board(tmp_path, text))
