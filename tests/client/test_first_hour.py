"""A newcomer's first hour, through the real `leadline` command and a real server.

Safe defaults (a threshold typo never passes a gate), fast clear failures (nothing
listening, a bad token, a typo in a flag), gate output that cannot be misread (the
one-sided bound the verdict used, a labels hint the pool can honour), and a command line
that behaves the same way everywhere.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import re
import subprocess
import sys
import time
from importlib import metadata
from pathlib import Path

import grpc
import numpy as np
import pytest

from leadline.client import (
    BoundKind,
    Client,
    Conflict,
    EstimatorMode,
    InvalidRequest,
    LeadlineError,
    LocalServer,
    Unavailable,
    Verdict,
)
from leadline.client import cli as cli_module
from leadline.client.report import collect_report_data, render_report

from .conftest import TOKENS, Digits, digits_pool, run_cli

# Nothing listens on loopback port 9 (discard) on this machine.
_NOBODY = "127.0.0.1:9"


def _reader(server: LocalServer, *args: str, **kwargs: object) -> subprocess.CompletedProcess[str]:
    return run_cli(*args, token=TOKENS["reader"], target=server.target, **kwargs)  # type: ignore[arg-type]


# -- 1. a threshold outside (0, B) is refused, by every client ------------------------------


@pytest.mark.parametrize("max_risk", ["5", "1.5", "1", "0", "-0.2", "nan"])
def test_gate_threshold_outside_the_loss_range_exits_3_naming_the_largest_loss(
    server: LocalServer, labeled_digits: Digits, max_risk: str
) -> None:
    # A zero-one pool: every loss is 0 or 1, so the risk lies in [0, 1] and a threshold
    # of 5 or 1.5 would pass any model (it did, exit 0, before).
    done = _reader(server, "gate", "--pool", labeled_digits.pool, "--max-risk", max_risk)
    assert done.returncode == 3, done.stdout
    assert done.stdout == ""
    assert "must be in (0, 1)" in done.stderr or "must be a finite risk > 0" in done.stderr
    assert done.stderr.startswith("leadline gate: INVALID_ARGUMENT: --max-risk "), done.stderr


def test_python_client_gets_the_same_rule_from_the_server(admin: Client, labeled_digits: Digits):
    with pytest.raises(InvalidRequest) as caught:
        admin.check_gate(labeled_digits.pool, max_risk=1.5)
    assert caught.value.code is grpc.StatusCode.INVALID_ARGUMENT
    assert caught.value.details.startswith("max_risk = 1.5: must be in (0, 1).")


def test_the_largest_loss_is_the_pools_own(admin: Client) -> None:
    # A cost-matrix pool whose largest cost is 5: B = 5 (the loss definition's bound), so
    # 4.5 is a threshold (refused only because the pool is still empty) and 5 is not.
    admin.create_pool(
        "cost-five",
        task="classification",
        num_classes=2,
        feature_dim=1,
        loss="cost-matrix",
        cost_matrix=[[0, 5], [1, 0]],
    )
    try:
        with pytest.raises(InvalidRequest, match=r"max_risk = 5: must be in \(0, 5\)"):
            admin.check_gate("cost-five", max_risk=5)
        with pytest.raises(Conflict, match="no items in scope"):
            admin.check_gate("cost-five", max_risk=4.5)
    finally:
        admin.delete_pool("cost-five")


# -- 2. nothing listening: a few seconds, what happened, what to do --------------------------


@pytest.mark.parametrize(
    ("target", "extra", "happened", "advice"),
    [
        (_NOBODY, (), "connection refused", "leadline serve"),
        ("no-such-host.invalid:50051", (), "could not be resolved", "LEADLINE_TARGET"),
        ("", ("--tls",), "TLS handshake failed", "drop --tls"),
    ],
    ids=["refused", "unknown-name", "tls-to-plain-server"],
)
def test_cli_against_no_server_fails_fast_with_what_to_do(
    server: LocalServer, target: str, extra: tuple[str, ...], happened: str, advice: str
) -> None:
    target = target or server.target
    # --timeout 120: waiting out the call's deadline would overrun the 40 s child timeout.
    done = run_cli(
        "status",
        "--pool",
        "digits",
        "--timeout",
        "120",
        *extra,
        token=TOKENS["reader"],
        target=target,
        timeout=40,
    )
    assert done.returncode == 3
    assert done.stderr.startswith(
        f"leadline status: UNAVAILABLE: cannot reach a leadline server at {target}"
    ), done.stderr
    assert happened in done.stderr
    assert advice in done.stderr
    assert "DEADLINE_EXCEEDED" not in done.stderr
    assert "Traceback" not in done.stderr
    assert "Handshake failed" not in done.stderr


def test_python_client_error_class_and_message_agree() -> None:
    with Client(_NOBODY, timeout=120) as client, pytest.raises(Unavailable) as caught:
        client.get_pool("p")
    assert type(caught.value) is Unavailable
    assert caught.value.code is grpc.StatusCode.UNAVAILABLE
    assert str(caught.value).startswith(
        f"UNAVAILABLE in GetPool: cannot reach a leadline server at {_NOBODY}"
    )


def test_gate_wait_keeps_polling_an_unreachable_server() -> None:
    done = run_cli(
        "gate",
        "--pool",
        "p",
        "--max-risk",
        "0.1",
        "--wait",
        "2",
        "--interval",
        "0.5",
        target=_NOBODY,
        timeout=60,
    )
    assert done.returncode == 3
    polls = [line for line in done.stderr.splitlines() if "polling again in 0.5 s" in line]
    assert polls
    assert all("cannot reach a leadline server" in line for line in polls)
    assert done.stderr.splitlines()[-1].startswith("leadline gate: UNAVAILABLE: cannot reach")


# -- 3. gate --wait says what it is waiting for ---------------------------------------------


def _undecided_threshold(admin: Client, pool: str) -> float:
    """The gate's own point estimate: a threshold the gate cannot decide."""
    return admin.check_gate(pool, max_risk=0.5).estimate.risk


def test_gate_wait_prints_one_line_per_poll(
    server: LocalServer, admin: Client, labeled_digits: Digits
) -> None:
    threshold = _undecided_threshold(admin, labeled_digits.pool)
    done = _reader(
        server,
        "gate",
        "--pool",
        labeled_digits.pool,
        "--max-risk",
        repr(threshold),
        "--wait",
        "1.5",
        "--interval",
        "0.3",
    )
    assert done.returncode == 2, done.stderr
    line = re.compile(
        r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ  undecided: 200 labels; one-sided 95% anytime "
        rf"bounds \[0\.\d{{4}}, 0\.\d{{4}}\] vs --max-risk {threshold:g}; polling again in "
        r"0\.3 s$"
    )
    polls = done.stderr.splitlines()
    assert len(polls) >= 2, done.stderr
    assert all(line.match(p) for p in polls), done.stderr


# -- 4. a released assignment says so ---------------------------------------------------------


def test_submitting_a_released_assignment_says_it_was_released_and_when(admin: Client) -> None:
    data = digits_pool("released-late")
    admin.create_pool(
        data.pool, task="classification", num_classes=10, feature_dim=64, loss="zero-one"
    )
    try:
        admin.ingest(data.pool, data.item_ids[:50], data.features[:50], data.probabilities[:50])
        (held,) = admin.acquire(data.pool, 1, labeler="vendor", lease_seconds=3600)
        before = time.time() * 1000
        admin.release(data.pool, [held.assignment_id], labeler="vendor")
        with pytest.raises(Conflict) as caught:
            admin.submit_labels(data.pool, {held.assignment_id: 3}, labeler="vendor")
        message = caught.value.details
        assert "released at " in message
        assert "lease" not in message.split("released")[0]
        when = int(re.search(r"\((\d+) unix ms\)", message).group(1))  # type: ignore[union-attr]
        # The release time, not the lease's end an hour ahead.
        assert before - 1000 <= when <= time.time() * 1000
        assert time.strftime("%Y-%m-%d", time.gmtime(when / 1000)) in message
    finally:
        admin.delete_pool(data.pool)


# -- 5. client-side refusals and errors in the command line's words --------------------------


def test_client_side_refusals_are_invalid_requests() -> None:
    with pytest.raises(InvalidRequest, match="target = 'localhost': must be HOST:PORT"):
        Client("localhost")
    with Client(_NOBODY) as client:
        for call in (
            lambda: client.check_gate("p", max_risk=math.nan),
            lambda: client.ingest("p", ["a"], np.zeros((2, 3)), np.zeros((2, 2))),
            lambda: client.get_pool(""),
            lambda: client.get_estimate("p", mode="loud"),
        ):
            with pytest.raises(InvalidRequest) as caught:
                call()
            assert isinstance(caught.value, LeadlineError)
            assert caught.value.code is grpc.StatusCode.INVALID_ARGUMENT


@pytest.mark.parametrize(
    ("flags", "message"),
    [
        (
            ("--task", "classification", "--classes", "1", "--loss", "zero-one"),
            "--classes 1: a classification pool needs 2..10000 classes.",
        ),
        (
            ("--task", "classification", "--classes", "3", "--loss", "squared-error"),
            "--loss squared-error: a classification pool takes zero-one, cross-entropy, "
            "brier or cost-matrix.",
        ),
        (
            ("--task", "regression", "--loss", "squared-error"),
            "--loss-cap 0.0: a regression pool needs a finite cap > 0",
        ),
    ],
    ids=["one-class", "regression-loss", "no-cap"],
)
def test_pool_create_errors_name_the_flag_and_its_spelling(
    server: LocalServer, flags: tuple[str, ...], message: str
) -> None:
    done = run_cli(
        "pool",
        "create",
        "--pool",
        "typo",
        "--features",
        "4",
        *flags,
        token=TOKENS["admin"],
        target=server.target,
    )
    assert done.returncode == 3
    assert done.stderr.startswith(f"leadline pool create: INVALID_ARGUMENT: {message}")
    assert "pool." not in done.stderr
    assert "LOSS_KIND" not in done.stderr


def test_token_problems_name_the_flag_or_the_variable(server: LocalServer, tmp_path: Path):
    missing = run_cli("status", "--pool", "digits", target=server.target)
    assert missing.returncode == 3
    assert "no token was given: set LEADLINE_TOKEN or pass --token-file FILE" in missing.stderr
    wrong = run_cli("status", "--pool", "digits", token="not-a-token", target=server.target)
    assert "the server does not know the token from LEADLINE_TOKEN" in wrong.stderr
    absent = tmp_path / "no-such-file"
    unreadable = run_cli(
        "status", "--pool", "digits", "--token-file", str(absent), target=server.target
    )
    assert unreadable.returncode == 3
    assert unreadable.stderr.startswith(
        f"leadline status: --token-file {str(absent)!r}: cannot read it (No such file"
    )
    bad_target = run_cli("status", "--pool", "digits", token="x", target="localhost")
    assert bad_target.returncode == 3
    assert "LEADLINE_TARGET 'localhost': must be HOST:PORT" in bad_target.stderr


def test_server_config_errors_from_the_environment_name_the_variable(tmp_path: Path) -> None:
    env = {k: v for k, v in os.environ.items() if not k.startswith("LEADLINE_")}
    env["LEADLINE_SELECTION_FLOOR"] = "2"
    done = subprocess.run(
        [sys.executable, "-m", "leadline.client.cli", "serve", "--data-dir", str(tmp_path)],
        capture_output=True,
        text=True,
        env=env,
        timeout=60,
        check=False,
    )
    assert done.returncode == 3
    assert done.stderr.startswith(
        "leadline serve: environment variable LEADLINE_SELECTION_FLOOR: selection_floor = 2.0"
    ), done.stderr


def test_a_second_server_on_a_taken_port_says_so(tmp_path: Path) -> None:
    import socket

    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        done = subprocess.run(
            [
                sys.executable,
                "-m",
                "leadline.client.cli",
                "serve",
                "--data-dir",
                str(tmp_path),
                "--insecure-no-auth",
                "--listen",
                f"127.0.0.1:{port}",
            ],
            capture_output=True,
            text=True,
            timeout=60,
            check=False,
        )
    assert done.returncode == 3
    assert done.stderr.splitlines()[-1] == (
        f"leadline serve: listen = '127.0.0.1:{port}': cannot bind (address already in use). "
        "Another leadline server or another program may listen there: stop it, or give this "
        "server another address with --listen HOST:PORT (or LEADLINE_LISTEN)."
    )
    assert "add_port" not in done.stderr  # no gRPC log line before it


# -- 6, 7. the gate's words: the one-sided bound it used, a hint the pool can honour ----------


def test_gate_prints_the_one_sided_bound_the_verdict_used(
    server: LocalServer, admin: Client, labeled_digits: Digits
) -> None:
    result = admin.check_gate(labeled_digits.pool, max_risk=0.9)
    assert result.verdict is Verdict.PASS
    done = _reader(server, "gate", "--pool", labeled_digits.pool, "--max-risk", "0.9")
    assert done.returncode == 0
    lines = done.stdout.splitlines()
    assert lines[1] == f"  one-sided 95% anytime upper bound {result.upper:.4f} < 0.9"
    # No two-sided interval beside it: those are GetEstimate's, not the gate's.
    assert "two-sided" not in done.stdout
    assert "fixed-time" not in done.stdout


def test_labels_hint_never_exceeds_the_unlabeled_items_and_is_printed_once(
    server: LocalServer, admin: Client, labeled_digits: Digits
) -> None:
    threshold = _undecided_threshold(admin, labeled_digits.pool)
    unlabeled = len(labeled_digits.item_ids) - 200
    result = admin.check_gate(labeled_digits.pool, max_risk=threshold)
    # The estimate sits on the threshold: the 1/sqrt(labels) extrapolation asks for
    # "infinitely" many labels; the pool has 997 left, and they may not be enough.
    assert result.verdict is Verdict.UNDECIDED
    assert result.more_labels_hint == unlabeled
    assert result.labels_may_not_suffice
    assert f"even labeling all {unlabeled:,} unlabeled items in scope" in result.reason
    done = _reader(server, "gate", "--pool", labeled_digits.pool, "--max-risk", repr(threshold))
    assert done.returncode == 2
    assert done.stdout.count(f"even labeling all {unlabeled:,} unlabeled items in scope") == 1
    assert "more labels" not in done.stdout, done.stdout
    # A threshold close to the bound: an ordinary hint, smaller than what is left.
    near = result.estimate.risk + 0.9 * (result.upper - result.estimate.risk)
    closer = admin.check_gate(labeled_digits.pool, max_risk=near)
    assert closer.verdict is Verdict.UNDECIDED
    assert 0 < closer.more_labels_hint < unlabeled
    assert not closer.labels_may_not_suffice
    done = _reader(server, "gate", "--pool", labeled_digits.pool, "--max-risk", repr(near))
    assert done.stdout.count("more labels") == 1, done.stdout


def test_report_plots_and_states_the_bound_the_gate_used(
    admin: Client, labeled_digits: Digits
) -> None:
    data = collect_report_data(admin, labeled_digits.pool, max_risk=0.5)
    assert data.gate is not None
    # The plotted line ends at the very bound the verdict compared with the threshold.
    assert data.gate_trace[-1].anytime_upper == pytest.approx(data.gate.upper, abs=1e-12)
    assert data.gate_trace[-1].anytime_lower == pytest.approx(data.gate.lower, abs=1e-12)
    from leadline.client.report import _html

    page = _html(data, [])
    verdict = str(data.gate.verdict).upper()
    assert f"Gate: {verdict} (risk below 0.5000 at 95% confidence, anytime bound)" in page
    assert "one-sided 95% anytime" in page
    assert "two-sided 95% fixed-time interval" in page


# -- 8, 9. Python enums, our own flat JSON --------------------------------------------------


def test_python_results_carry_python_enums(admin: Client, labeled_digits: Digits) -> None:
    result = admin.check_gate(labeled_digits.pool, max_risk=0.9, bound="fixed-time")
    assert result.verdict is Verdict.PASS
    assert str(result.verdict) == "pass"
    assert result.verdict == "pass"
    assert result.bound is BoundKind.FIXED_TIME
    assert str(result.bound) == "fixed-time"
    estimate = admin.get_estimate(labeled_digits.pool, mode="unbiased")
    assert estimate.mode is EstimatorMode.UNBIASED
    assert str(estimate.mode) == "unbiased"
    trace = admin.get_estimate_trace(labeled_digits.pool, max_points=3)
    assert {point.mode for point in trace} == {EstimatorMode.BALANCED}


_GATE_KEYS = {
    "pool", "segment", "verdict", "max_risk", "confidence", "bound", "sides", "lower",
    "upper", "risk", "std_error", "mode", "bias_bound", "unbiased_weight",
    "nonresponse_allowance", "loss_bound", "items_in_scope", "items_unreached",
    "labels_used", "labels_pending", "labels_skipped", "surrogate_version",
    "more_labels_hint", "labels_may_not_suffice", "reason",
}  # fmt: skip


def _flat(value: dict[str, object]) -> bool:
    return all(
        isinstance(v, str | int | float | bool | type(None))
        or (isinstance(v, list) and all(isinstance(x, str | int | float) for x in v))
        for v in value.values()
    )


def test_json_output_is_flat_with_plain_numbers_and_enum_words(
    server: LocalServer, labeled_digits: Digits
) -> None:
    gate = json.loads(
        _reader(server, "gate", "--pool", labeled_digits.pool, "--max-risk", "0.9", "--json").stdout
    )
    assert set(gate) == _GATE_KEYS
    assert _flat(gate)
    assert (gate["verdict"], gate["bound"], gate["mode"]) == ("pass", "anytime", "balanced")
    assert isinstance(gate["labels_used"], int)
    assert gate["labels_used"] == 200
    status = json.loads(_reader(server, "status", "--pool", labeled_digits.pool, "--json").stdout)
    assert set(status) == {"pool", "estimate", "segments"}
    assert _flat(status["pool"])
    assert _flat(status["estimate"])
    assert all(_flat(s) for s in status["segments"])
    assert status["pool"]["task"] == "classification"
    assert status["pool"]["loss"] == "zero-one"
    assert status["pool"]["item_count"] == len(labeled_digits.item_ids)
    assert status["estimate"]["sides"] == "two-sided"
    listed = json.loads(_reader(server, "pool", "list", "--json").stdout)
    assert all(_flat(p) for p in listed)


# -- 11. one command line ---------------------------------------------------------------------


def _subparsers(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    found: dict[str, argparse.ArgumentParser] = {}
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for name, sub in action.choices.items():
                found[f"{parser.prog} {name}".removeprefix("leadline ")] = sub
                found.update(_subparsers(sub))
    return found


def test_every_flag_has_help_and_every_command_names_its_pool_with_pool() -> None:
    from leadline.service.server import _parser as serve_parser

    commands = _subparsers(cli_module.build_parser())
    parsers = {"": cli_module.build_parser(), **commands, "serve": serve_parser()}
    for name, parser in parsers.items():
        for action in parser._actions:
            if action.option_strings:
                assert action.help, f"leadline {name} {action.option_strings}"
            if isinstance(action, argparse._SubParsersAction):
                for choice in action._choices_actions:
                    assert choice.help, f"leadline {name} {choice.dest}"
    for name, parser in commands.items():
        if name in ("serve", "check", "pool", "pool list", "validation", "demo"):
            continue
        options = {s for a in parser._actions for s in a.option_strings}
        positionals = [a.dest for a in parser._actions if not a.option_strings]
        assert "--pool" in options, name
        assert positionals == [], name


def test_pool_defaults_are_spelled_like_the_server_settings_they_override() -> None:
    from leadline.service.server import _parser as serve_parser

    create = _subparsers(cli_module.build_parser())["pool create"]
    create_flags = {s for a in create._actions for s in a.option_strings}
    serve_flags = {s for a in serve_parser()._actions for s in a.option_strings}
    for flag in (
        "--selection-floor",
        "--default-lease-seconds",
        "--default-confidence",
        "--refit-every-labels",
    ):
        assert flag in create_flags
        assert flag in serve_flags
    # The other settings' help names the pool field they set.
    helps = {a.option_strings[0]: a.help for a in create._actions if a.option_strings}
    assert "(num_classes)" in helps["--classes"]
    assert "(feature_dim)" in helps["--features"]


def test_version_flag() -> None:
    done = run_cli("--version")
    assert done.returncode == 0
    assert done.stdout.strip() == f"leadline {metadata.version('leadline')}"


def test_export_into_a_closed_pipe_ends_quietly(server: LocalServer, admin: Client) -> None:
    data = digits_pool("export-pipe")
    admin.create_pool(
        data.pool, task="classification", num_classes=10, feature_dim=64, loss="zero-one"
    )
    try:
        admin.ingest(data.pool, data.item_ids, data.features, data.probabilities)
        # 1,197 draws make about 180 kB of CSV: more than a pipe holds, so the writer
        # still has rows to write after the reader has gone.
        while admin.acquire(data.pool, 1000, labeler="vendor"):
            pass
        env = {k: v for k, v in os.environ.items() if not k.startswith("LEADLINE_")}
        env |= {"LEADLINE_TOKEN": TOKENS["reader"], "LEADLINE_TARGET": server.target}
        export = f"{sys.executable} -m leadline.client.cli export --pool {data.pool}"
        done = subprocess.run(
            ["sh", "-c", f"{export} | head -n 2"],
            capture_output=True,
            text=True,
            env=env,
            timeout=60,
            check=False,
        )
        assert done.stdout.startswith("draw_index,item_id,")
        assert len(done.stdout.splitlines()) == 2
        assert done.stderr == ""
    finally:
        admin.delete_pool(data.pool)


def test_pool_create_exist_ok_says_the_pool_already_existed(
    server: LocalServer, labeled_digits: Digits
) -> None:
    done = run_cli(
        "pool",
        "create",
        "--pool",
        labeled_digits.pool,
        "--task",
        "classification",
        "--classes",
        "10",
        "--features",
        "64",
        "--loss",
        "zero-one",
        "--exist-ok",
        token=TOKENS["admin"],
        target=server.target,
    )
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "pools/digits already existed; left as it is (--exist-ok)"
    without = run_cli(
        "pool",
        "create",
        "--pool",
        labeled_digits.pool,
        "--task",
        "classification",
        "--classes",
        "10",
        "--features",
        "64",
        "--loss",
        "zero-one",
        token=TOKENS["admin"],
        target=server.target,
    )
    assert without.returncode == 3
    assert without.stderr.rstrip().endswith("Add --exist-ok to accept a pool that already exists.")


# -- 12. the report of a pool without labels -----------------------------------------------


def test_report_of_a_pool_without_labels_has_no_warnings(
    server: LocalServer, admin: Client, tmp_path: Path
) -> None:
    data = digits_pool("no-labels-yet")
    admin.create_pool(
        data.pool, task="classification", num_classes=10, feature_dim=64, loss="zero-one"
    )
    try:
        admin.ingest(data.pool, data.item_ids, data.features, data.probabilities)
        done = _reader(server, "report", "--pool", data.pool, "--out", str(tmp_path))
        assert done.returncode == 0
        assert done.stderr == ""  # matplotlib's "No artists with labels" warning, before
        page = (tmp_path / f"{data.pool}.html").read_text()
        assert "the estimates below used version 0" in page
        # One number format: risks with four decimals, counts with thousands separators.
        assert "<tr><td>whole pool</td><td>" in page
        row = re.search(r"<tr><td>whole pool</td>(.*?)</tr>", page).group(1)  # type: ignore[union-attr]
        cells = re.findall(r"<td>(.*?)</td>", row)
        assert re.fullmatch(r"\d\.\d{4}", cells[0])
        assert re.fullmatch(r"\[\d\.\d{4}, \d\.\d{4}\]", cells[1])
        assert cells[4] == f"{len(data.item_ids):,}"
    finally:
        admin.delete_pool(data.pool)


def test_report_legends_never_cover_the_plot(admin: Client, labeled_digits: Digits) -> None:
    from matplotlib.figure import Figure

    from leadline.client.report import _PANELS

    data = collect_report_data(
        admin, labeled_digits.pool, max_risk=0.5, reference_risk=labeled_digits.true_risk
    )
    render_report(data)  # no warnings (pytest turns them into errors)
    for title, draw in _PANELS:
        figure = Figure(figsize=(6.4, 4.2), layout="constrained")
        ax = figure.subplots()
        draw(ax, data)
        figure.canvas.draw()  # type: ignore[attr-defined]
        legend = ax.get_legend()
        assert legend is not None, title
        box, area = legend.get_window_extent(), ax.get_window_extent()
        # Below the axes: nothing drawn inside the plot (points, notes) can sit under it.
        assert box.y1 <= area.y0, title
