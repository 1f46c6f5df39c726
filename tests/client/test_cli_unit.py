"""Command-line behaviour that needs no server: usage errors exit 3, never argparse's 2."""

from __future__ import annotations

import pytest

from leadline.client import cli


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        ([], "leadline: the following arguments are required: COMMAND"),
        (["gate", "--pool", "p"], "the following arguments are required: --max-risk"),
        (["gate", "--pool", "p", "--max-risk", "x"], "argument --max-risk: invalid float value"),
        (
            ["gate", "--pool", "p", "--max-risk", "0.1", "--bound", "fixed-time", "--wait", "5"],
            "--wait polls repeatedly, which only the anytime bound allows",
        ),
        (["gate", "--pool", "p", "--max-risk", "0.1", "--bound", "sometimes"], "invalid choice"),
        (["pool", "delete", "--pool", "p"], "add --yes to confirm"),
        (["pool", "create", "--pool", "p", "--task", "ranking"], "argument --task: invalid choice"),
        (["status"], "the following arguments are required: --pool"),
    ],
)
def test_usage_errors_exit_3_with_a_message(
    argv: list[str], message: str, capsys: pytest.CaptureFixture[str]
) -> None:
    # 2 would read as UNDECIDED to a CI job running `leadline gate`.
    assert cli.main(argv) == cli.EXIT_ERROR == 3
    assert message in capsys.readouterr().err


def test_unreachable_server_exits_3_naming_the_failure(capsys: pytest.CaptureFixture[str]) -> None:
    code = cli.main(
        ["gate", "--pool", "p", "--max-risk", "0.1", "--target", "127.0.0.1:9", "--timeout", "0.5"]
    )
    assert code == 3
    err = capsys.readouterr().err
    assert err.startswith("leadline gate: ")
    assert "DEADLINE_EXCEEDED" in err or "UNAVAILABLE" in err


def test_help_lists_every_command(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as caught:
        cli.main(["--help"])
    assert caught.value.code == 0
    out = capsys.readouterr().out
    for command in ("serve", "pool", "status", "gate", "report", "export", "demo"):
        assert f"    {command} " in out


def test_target_and_token_come_from_the_environment(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("LEADLINE_TARGET", "leadline.example:443")
    monkeypatch.setenv("LEADLINE_TOKEN", "from-env")
    args = cli.build_parser().parse_args(["status", "--pool", "p"])
    client = cli._client(args)
    try:
        assert client.target == "leadline.example:443"
        assert client._metadata == (("authorization", "Bearer from-env"),)
    finally:
        client.close()


def test_cost_matrix_flag_parses_rows_and_refuses_junk() -> None:
    assert cli._cost_matrix("0,1;5,0") == [[0.0, 1.0], [5.0, 0.0]]
    with pytest.raises(cli._UsageError, match="--cost-matrix '0,x': rows separated by ';'"):
        cli._cost_matrix("0,x")
