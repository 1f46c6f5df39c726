"""The ``leadline`` command.

Exit codes, for scripts and CI: 0 success; 3 error (bad arguments, server unreachable, a
refused call). ``leadline gate`` adds 1 for FAIL and 2 for UNDECIDED (0 is PASS).

Connection settings come from flags or the environment: ``--target`` /
``LEADLINE_TARGET`` (host:port), ``--token`` / ``LEADLINE_TOKEN`` (or ``--token-file``),
``--tls`` / ``--tls-ca`` / ``--tls-cert`` / ``--tls-key`` for TLS and mutual TLS.
``leadline serve`` runs the server itself and takes the server's own flags; ``leadline
check --data-dir DIR`` checks a server's database (both need the server's dependencies).
"""

from __future__ import annotations

import argparse
import csv
import json
import logging
import os
import sys
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any, NoReturn

import numpy as np
from google.protobuf import json_format

from leadline.client._client import Client, pool_name
from leadline.client._enums import choices, enum_name
from leadline.client._errors import LeadlineError
from leadline.client._tls import TlsConfig
from leadline.client.export import write_draws_csv
from leadline.v1 import leadline_pb2

__all__ = ["DEFAULT_TARGET", "EXIT_ERROR", "EXIT_FAIL", "EXIT_PASS", "EXIT_UNDECIDED", "main"]

_LOG = logging.getLogger(__name__)

DEFAULT_TARGET = "localhost:50051"
EXIT_PASS = 0
EXIT_OK = 0
EXIT_FAIL = 1
EXIT_UNDECIDED = 2
EXIT_ERROR = 3
_GATE_EXIT = {
    leadline_pb2.VERDICT_PASS: EXIT_PASS,
    leadline_pb2.VERDICT_FAIL: EXIT_FAIL,
    leadline_pb2.VERDICT_UNDECIDED: EXIT_UNDECIDED,
}


class _UsageError(Exception):
    """Bad command-line arguments (argparse would exit 2, which means UNDECIDED here)."""


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> NoReturn:
        raise _UsageError(f"{self.prog}: {message}")


def _connection_options() -> _Parser:
    common = _Parser(add_help=False)
    group = common.add_argument_group("connection")
    group.add_argument(
        "--target",
        default=os.environ.get("LEADLINE_TARGET", DEFAULT_TARGET),
        help="server host:port (env LEADLINE_TARGET; default %(default)s)",
    )
    group.add_argument(
        "--token",
        default=None,
        help="bearer token (env LEADLINE_TOKEN; prefer the environment or --token-file, "
        "a command line is visible to other users)",
    )
    group.add_argument("--token-file", type=Path, help="read the bearer token from this file")
    group.add_argument(
        "--timeout", type=float, default=30.0, help="deadline of each call, seconds (%(default)s)"
    )
    group.add_argument("--tls", action="store_true", help="use TLS with the system's CA roots")
    group.add_argument("--tls-ca", type=Path, help="CA certificate (PEM) to check the server")
    group.add_argument("--tls-cert", type=Path, help="client certificate (PEM) for mutual TLS")
    group.add_argument("--tls-key", type=Path, help="client private key (PEM) for mutual TLS")
    group.add_argument("--tls-server-name", help="name to check in the server's certificate")
    group.add_argument("-v", "--verbose", action="store_true", help="log progress to stderr")
    return common


def build_parser() -> argparse.ArgumentParser:
    """The full command-line parser (``serve`` is forwarded before parsing)."""
    common = _connection_options()
    parser = _Parser(
        prog="leadline",
        description="Label-efficient risk estimates and release gates for deployed models.",
        epilog="Exit codes: 0 success, 3 error; gate: 0 PASS, 1 FAIL, 2 UNDECIDED, 3 error.",
    )
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    commands.add_parser(
        "serve", add_help=False, help="run the server (see `leadline serve --help`)"
    )
    commands.add_parser(
        "check",
        add_help=False,
        help="check a data directory's database (see `leadline check --help`)",
    )

    pool = commands.add_parser("pool", help="create, list, show or delete pools")
    pool_commands = pool.add_subparsers(dest="pool_command", metavar="ACTION", required=True)
    create = pool_commands.add_parser("create", parents=[common], help="create a pool")
    create.add_argument("pool_id", help="new pool id: [a-z][a-z0-9-]{0,62}")
    create.add_argument("--task", required=True, choices=choices("TaskType"))
    create.add_argument("--features", type=int, required=True, help="feature vector length")
    create.add_argument("--classes", type=int, default=0, help="number of classes")
    create.add_argument("--loss", required=True, choices=choices("LossKind"))
    create.add_argument(
        "--cost-matrix",
        help="cost-matrix loss: rows separated by ';', values by ',' (row = predicted)",
    )
    create.add_argument("--loss-cap", type=float, default=0.0, help="regression loss cap")
    create.add_argument("--mode", choices=choices("EstimatorMode"), help="default estimator")
    create.add_argument("--description", default="")
    create.add_argument("--selection-floor", type=float, default=0.0)
    create.add_argument("--lease-seconds", type=int, default=0, help="default lease length")
    create.add_argument("--confidence", type=float, default=0.0, help="default confidence")
    create.add_argument("--refit-every", type=int, default=0, help="labels between refits")
    create.add_argument("--exist-ok", action="store_true", help="an existing pool is fine")
    listing = pool_commands.add_parser("list", parents=[common], help="list pools")
    listing.add_argument("--json", action="store_true", help="print JSON")
    show = pool_commands.add_parser("show", parents=[common], help="show one pool")
    show.add_argument("pool")
    show.add_argument("--json", action="store_true", help="print JSON")
    delete = pool_commands.add_parser("delete", parents=[common], help="delete a pool")
    delete.add_argument("pool")
    delete.add_argument("--yes", action="store_true", help="really delete (required)")

    validation = commands.add_parser(
        "validation", help="add validation items (labeled rows that teach the surrogate)"
    )
    validation_commands = validation.add_subparsers(
        dest="validation_command", metavar="ACTION", required=True
    )
    add = validation_commands.add_parser(
        "add",
        parents=[common],
        help="upload validation items from an .npz or .csv file",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description=_VALIDATION_HELP,
    )
    add.add_argument("--pool", required=True)
    add.add_argument("--file", type=Path, required=True, help="rows.npz or rows.csv")
    add.add_argument(
        "--request-id", help="makes a repeat of this upload harmless (same file, same id)"
    )

    status = commands.add_parser(
        "status", parents=[common], help="pool counts, labels, surrogate and current estimate"
    )
    status.add_argument("--pool", required=True)
    status.add_argument("--confidence", type=float, default=0.0)
    status.add_argument("--mode", choices=choices("EstimatorMode"))
    status.add_argument("--json", action="store_true", help="print JSON")

    gate = commands.add_parser(
        "gate",
        parents=[common],
        help="release gate: exit 0 PASS, 1 FAIL, 2 UNDECIDED, 3 error",
        description="Is the pool's risk below --max-risk at --confidence? Exit 0 PASS, "
        "1 FAIL, 2 UNDECIDED, 3 error.",
    )
    gate.add_argument("--pool", required=True)
    gate.add_argument("--max-risk", type=float, required=True)
    gate.add_argument("--confidence", type=float, default=0.0, help="0 = the pool's default")
    gate.add_argument(
        "--bound",
        choices=choices("BoundKind"),
        default="anytime",
        help="anytime (safe to poll, default) or fixed-time (one look only)",
    )
    gate.add_argument("--mode", choices=choices("EstimatorMode"))
    gate.add_argument("--segment", default="")
    gate.add_argument(
        "--wait",
        type=float,
        default=0.0,
        help="keep polling while UNDECIDED, up to this many seconds (anytime bound only)",
    )
    gate.add_argument("--interval", type=float, default=30.0, help="seconds between polls")
    gate.add_argument("--json", action="store_true", help="print JSON")

    report = commands.add_parser("report", parents=[common], help="write a PNG + HTML report")
    report.add_argument("--pool", required=True)
    report.add_argument("--out", type=Path, default=Path("reports"), help="output folder")
    report.add_argument("--confidence", type=float, default=0.0)
    report.add_argument("--max-risk", type=float, help="also show this gate threshold")
    report.add_argument("--bound", choices=choices("BoundKind"), default="anytime")

    export = commands.add_parser("export", parents=[common], help="draws and labels as CSV")
    export.add_argument("--pool", required=True)
    export.add_argument("--out", default="-", help="CSV file ('-' = standard output)")

    demo = commands.add_parser(
        "demo", help="end-to-end demo against a real local server (invented scenario)"
    )
    demo.add_argument("--out", type=Path, default=Path("reports") / "demo")
    demo.add_argument("--seed", type=int, default=7)
    demo.add_argument("--items", type=int, default=20_000, help="pool size")
    demo.add_argument("--budget", type=int, default=800, help="most labels the vendor gives")
    demo.add_argument("-v", "--verbose", action="store_true")
    return parser


_VALIDATION_HELP = """\
Upload validation items: labeled rows from outside the pool (your validation split, or
out-of-fold outputs on your training data) that teach leadline's surrogate before the
first pool label. They are never drawn and never enter an estimate or a count of pool
items. Role: ingest or admin.

.npz (numpy.savez) arrays, one row per item:
  item_ids   (n,) strings, unique among the pool's validation items
  features   (n, feature_dim) numbers
  outputs    (n, num_classes) held-out class probabilities, or (n,) predictions
  labels     (n,) class indices (classification) or target values (regression)
  segments   (n,) strings, optional
Save strings as a numpy string array (np.array(ids)), not as Python objects:
the file is read with allow_pickle=False.

.csv with a header row: item_id, label, feature_0 .. feature_{d-1}, output_0 ..
output_{K-1} (regression: one column output_0), optionally segment; any column order.

Producing the outputs with scikit-learn, for a model trained on (X, y):
  outputs = cross_val_predict(model, X, y, cv=5, method="predict_proba")
or the fitted model's predict_proba on a validation split it never trained on.
"""


def read_validation_file(path: Path) -> dict[str, Any]:
    """The arrays of a validation-items file (.npz or .csv, see ``validation add --help``).

    Returns item_ids, features, outputs, labels and segments (None if absent); ValueError
    names the file, the column and the rule.
    """
    suffix = path.suffix.lower()
    if suffix == ".npz":
        try:
            with np.load(path, allow_pickle=False) as data:
                arrays = {name: data[name] for name in data.files}
        except ValueError as error:
            raise ValueError(
                f"{path}: {error} (store strings as a numpy string array, not as objects)."
            ) from None
        missing = [k for k in ("item_ids", "features", "outputs", "labels") if k not in arrays]
        if missing:
            raise ValueError(
                f"{path}: arrays {missing} missing; needs item_ids, features, outputs, labels "
                f"(found {sorted(arrays)})."
            )
        segments = arrays.get("segments")
        return {
            "item_ids": [str(v) for v in arrays["item_ids"]],
            "features": arrays["features"],
            "outputs": arrays["outputs"],
            "labels": arrays["labels"],
            "segments": None if segments is None else [str(v) for v in segments],
        }
    if suffix == ".csv":
        return _read_validation_csv(path)
    raise ValueError(f"{path}: unknown file type {suffix!r}; give a .npz or a .csv file.")


def _numbered(header: list[str], prefix: str) -> list[int]:
    found = {}
    for position, name in enumerate(header):
        rest = name.removeprefix(prefix)
        if name.startswith(prefix) and rest.isdigit():
            found[int(rest)] = position
    if sorted(found) != list(range(len(found))):
        raise ValueError(f"columns {prefix}N must be numbered 0, 1, 2, ... without gaps.")
    return [found[i] for i in range(len(found))]


def _read_validation_csv(path: Path) -> dict[str, Any]:
    with open(path, newline="", encoding="utf-8") as handle:
        rows = list(csv.reader(handle))
    if not rows:
        raise ValueError(f"{path}: empty file; needs a header row and one row per item.")
    header = [name.strip() for name in rows[0]]
    body = rows[1:]
    for required in ("item_id", "label"):
        if required not in header:
            raise ValueError(f"{path}: no {required!r} column in the header {header}.")
    try:
        feature_columns = _numbered(header, "feature_")
        output_columns = _numbered(header, "output_")
    except ValueError as error:
        raise ValueError(f"{path}: {error}") from None
    if not feature_columns or not output_columns:
        raise ValueError(f"{path}: needs feature_0.. and output_0.. columns (header {header}).")

    def numbers(columns: list[int], what: str) -> np.ndarray:
        try:
            return np.array([[float(row[c]) for c in columns] for row in body], dtype=float)
        except (ValueError, IndexError) as error:
            raise ValueError(f"{path}: a {what} cell is not a number ({error}).") from None

    outputs = numbers(output_columns, "output")
    label_column = header.index("label")
    segment_column = header.index("segment") if "segment" in header else None
    return {
        "item_ids": [row[header.index("item_id")] for row in body],
        "features": numbers(feature_columns, "feature").reshape(len(body), len(feature_columns)),
        "outputs": outputs[:, 0] if len(output_columns) == 1 else outputs,
        "labels": numbers([label_column], "label")[:, 0] if body else np.zeros(0),
        "segments": None if segment_column is None else [row[segment_column] for row in body],
    }


def _client(args: argparse.Namespace) -> Client:
    token = args.token or os.environ.get("LEADLINE_TOKEN") or None
    if args.token_file is not None:
        token = args.token_file.read_text(encoding="utf-8").strip()
    tls: TlsConfig | bool = False
    if args.tls_ca or args.tls_cert or args.tls_key or args.tls_server_name:
        tls = TlsConfig.from_files(
            ca=args.tls_ca, cert=args.tls_cert, key=args.tls_key, server_name=args.tls_server_name
        )
    elif args.tls:
        tls = True
    return Client(args.target, token=token, tls=tls, timeout=args.timeout)


def _as_json(message: object) -> str:
    return json_format.MessageToJson(
        message,  # type: ignore[arg-type]
        preserving_proto_field_name=True,
        always_print_fields_with_no_presence=True,
    )


def _table(rows: Sequence[tuple[str, str]]) -> str:
    width = max(len(key) for key, _ in rows)
    return "\n".join(f"{key:<{width}}  {value}" for key, value in rows)


def _columns(header: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    widths = [max(len(str(c)) for c in column) for column in zip(header, *rows, strict=True)]
    lines = [header, *rows]
    return "\n".join(
        "  ".join(f"{cell:<{w}}" for cell, w in zip(line, widths, strict=True)).rstrip()
        for line in lines
    )


def _interval(low: float, high: float) -> str:
    return f"[{low:.4f}, {high:.4f}]"


def describe_estimate(est: leadline_pb2.Estimate) -> str:
    """One line: estimate ± half-width with both intervals."""
    half = (est.upper - est.lower) / 2
    return (
        f"{est.risk:.4f} ± {half:.4f}  ({est.confidence:.0%} fixed-time "
        f"{_interval(est.lower, est.upper)}; anytime "
        f"{_interval(est.anytime_lower, est.anytime_upper)})"
    )


def _pool_rows(pool: leadline_pb2.Pool) -> list[tuple[str, str]]:
    task = enum_name("TaskType", pool.task)
    shape = f"{pool.feature_dim} features"
    if pool.task == leadline_pb2.TASK_TYPE_CLASSIFICATION:
        shape = f"{pool.num_classes} classes, " + shape
    rows = [
        ("pool", pool.name),
        ("task", f"{task} ({shape})"),
        ("loss", enum_name("LossKind", pool.loss)),
        ("items", f"{pool.item_count:,}"),
        (
            "draws",
            f"{pool.draw_count:,} (labeled {pool.labeled_count:,}, pending "
            f"{pool.pending_count:,}, skipped {pool.skipped_count:,})",
        ),
        ("surrogate", _surrogate_text(pool)),
        (
            "validation",
            f"{pool.validation_count:,} items (teach the surrogate; never drawn or counted)"
            if pool.validation_count
            else "none",
        ),
        ("segments", ", ".join(pool.segments) or "-"),
    ]
    if pool.description:
        rows.insert(1, ("description", pool.description))
    return rows


def _surrogate_text(pool: leadline_pb2.Pool) -> str:
    if pool.surrogate_version == 0:
        return "version 0 (cold start: the model's own outputs)"
    if pool.surrogate_label_count == 0 and pool.surrogate_validation_count == 0:
        return f"version {pool.surrogate_version} (cold start: too few labels to fit)"
    parts = [f"{pool.surrogate_label_count:,} pool labels"]
    if pool.surrogate_validation_count:
        parts.append(f"{pool.surrogate_validation_count:,} validation items")
    return f"version {pool.surrogate_version}, fitted on " + " and ".join(parts)


def _cost_matrix(text: str | None) -> list[list[float]] | None:
    if not text:
        return None
    try:
        return [[float(v) for v in row.split(",")] for row in text.split(";") if row.strip()]
    except ValueError:
        raise ValueError(
            f"--cost-matrix == {text!r}: rows separated by ';', numbers by ',' (e.g. '0,1;5,0')."
        ) from None


def _run_pool(args: argparse.Namespace) -> int:
    with _client(args) as client:
        if args.pool_command == "create":
            pool = client.create_pool(
                args.pool_id,
                task=args.task,
                feature_dim=args.features,
                num_classes=args.classes,
                loss=args.loss,
                cost_matrix=_cost_matrix(args.cost_matrix),
                loss_cap=args.loss_cap,
                default_mode=args.mode,
                description=args.description,
                selection_floor=args.selection_floor,
                default_lease_seconds=args.lease_seconds,
                default_confidence=args.confidence,
                refit_every_labels=args.refit_every,
                exist_ok=args.exist_ok,
            )
            print(f"created {pool.name}")
        elif args.pool_command == "list":
            pools = client.list_pools()
            if args.json:
                print(json.dumps([json.loads(_as_json(p)) for p in pools], indent=2))
            elif not pools:
                print("no pools")
            else:
                header = ("NAME", "TASK", "LOSS", "ITEMS", "LABELED", "SURROGATE")
                rows = [
                    (
                        p.name,
                        enum_name("TaskType", p.task),
                        enum_name("LossKind", p.loss),
                        f"{p.item_count:,}",
                        f"{p.labeled_count:,}",
                        f"v{p.surrogate_version}",
                    )
                    for p in pools
                ]
                print(_columns(header, rows))
        elif args.pool_command == "show":
            pool = client.get_pool(args.pool)
            print(_as_json(pool) if args.json else _table(_pool_rows(pool)))
        elif args.pool_command == "delete":
            if not args.yes:
                raise _UsageError(
                    f"leadline pool delete: deleting {pool_name(args.pool)} removes all its "
                    "items, draws and labels; add --yes to confirm."
                )
            client.delete_pool(args.pool)
            print(f"deleted {pool_name(args.pool)}")
    return EXIT_OK


def _run_validation(args: argparse.Namespace) -> int:
    columns = read_validation_file(args.file)
    with _client(args) as client:
        result = client.add_validation(
            args.pool,
            columns["item_ids"],
            columns["features"],
            columns["outputs"],
            columns["labels"],
            segments=columns["segments"],
            request_id=args.request_id,
        )
    print(
        f"added {result.accepted:,} validation items to {pool_name(args.pool)} "
        f"({result.duplicates:,} duplicates, {result.rejected:,} rejected); the pool holds "
        f"{result.item_count:,} validation items"
    )
    for error in result.errors:
        print(f"  rejected {error.item_id}: {error.reason}")
    if result.accepted:
        print("  a surrogate refit on them starts now; the next draw waits for it")
    return EXIT_OK


def _run_status(args: argparse.Namespace) -> int:
    with _client(args) as client:
        pool = client.get_pool(args.pool)
        if pool.item_count == 0:
            # The server has no estimate for an empty pool (FAILED_PRECONDITION).
            est, segments = None, {}
        else:
            est = client.get_estimate(args.pool, confidence=args.confidence, mode=args.mode)
            segments = {
                s: client.get_estimate(
                    args.pool, confidence=args.confidence, mode=args.mode, segment=s
                )
                for s in pool.segments
            }
    if args.json:
        payload = {
            "pool": json.loads(_as_json(pool)),
            "estimate": json.loads(_as_json(est)) if est is not None else None,
            "segments": {s: json.loads(_as_json(e)) for s, e in segments.items()},
        }
        print(json.dumps(payload, indent=2))
        return EXIT_OK
    rows = _pool_rows(pool)
    if est is None:
        rows.append(("estimate", "none yet: the pool has no items"))
    else:
        rows += [
            ("estimate", describe_estimate(est)),
            (
                "mode",
                f"{enum_name('EstimatorMode', est.mode)} (unbiased weight "
                f"{est.unbiased_weight:.2f}, bias bound {est.bias_bound:.4f})",
            ),
            (
                "labels",
                f"{est.labels_used:,} used, {est.labels_pending:,} pending, "
                f"{est.labels_skipped:,} skipped",
            ),
        ]
        if est.items_unreached:
            rows.append(("unreached", f"{est.items_unreached:,} items arrived after the last draw"))
    print(_table(rows))
    if segments:
        header = ("SEGMENT", "ITEMS", "LABELS", "ESTIMATE", "FIXED-TIME", "ANYTIME")
        table = [
            (
                name,
                f"{e.items_in_scope:,}",
                f"{e.labels_used:,}",
                f"{e.risk:.4f}",
                _interval(e.lower, e.upper),
                _interval(e.anytime_lower, e.anytime_upper),
            )
            for name, e in sorted(segments.items())
        ]
        print()
        print(_columns(header, table))
    return EXIT_OK


def _run_gate(args: argparse.Namespace) -> int:
    if args.wait > 0 and args.bound != "anytime":
        raise _UsageError(
            "leadline gate: --wait polls repeatedly, which only the anytime bound allows "
            f"(got --bound {args.bound})."
        )
    if args.interval <= 0:
        raise _UsageError(f"leadline gate: --interval == {args.interval}, must be > 0.")
    deadline = time.monotonic() + args.wait
    with _client(args) as client:
        while True:
            result = client.check_gate(
                args.pool,
                max_risk=args.max_risk,
                confidence=args.confidence,
                bound=args.bound,
                mode=args.mode,
                segment=args.segment,
            )
            undecided = result.verdict == leadline_pb2.VERDICT_UNDECIDED
            if not undecided or time.monotonic() + args.interval > deadline:
                break
            _LOG.info("gate undecided (%s); polling again in %s s", result.reason, args.interval)
            time.sleep(args.interval)
    if result.verdict not in _GATE_EXIT:
        print(f"leadline gate: server answered verdict {result.verdict}", file=sys.stderr)
        return EXIT_ERROR
    verdict = enum_name("Verdict", result.verdict).upper()
    if args.json:
        print(_as_json(result))
    else:
        scope = f" segment {args.segment}" if args.segment else ""
        print(f"{verdict}: {pool_name(args.pool)}{scope}, risk below {args.max_risk:g}?")
        print(f"  estimate {describe_estimate(result.estimate)}")
        print(f"  {result.reason}")
        if undecided and result.more_labels_hint:
            print(f"  about {result.more_labels_hint:,} more labels may decide it")
    return _GATE_EXIT[result.verdict]


def _run_report(args: argparse.Namespace) -> int:
    from leadline.client.report import collect_report_data, write_report

    with _client(args) as client:
        data = collect_report_data(
            client,
            args.pool,
            confidence=args.confidence,
            max_risk=args.max_risk,
            bound=args.bound,
        )
    files = write_report(data, args.out, stem=pool_name(args.pool).removeprefix("pools/"))
    print(f"wrote {files.png}")
    print(f"wrote {files.html}")
    return EXIT_OK


def _run_export(args: argparse.Namespace) -> int:
    with _client(args) as client:
        draws = client.iter_draws(args.pool)
        if args.out == "-":
            count = write_draws_csv(draws, sys.stdout)
        else:
            count = write_draws_csv(draws, args.out)
            print(f"wrote {count} draws to {args.out}", file=sys.stderr)
    return EXIT_OK


def _run_demo(args: argparse.Namespace) -> int:
    from leadline.client.demo import run_demo

    return run_demo(out_dir=args.out, seed=args.seed, items=args.items, budget=args.budget)


_COMMANDS = {
    "pool": _run_pool,
    "validation": _run_validation,
    "status": _run_status,
    "gate": _run_gate,
    "report": _run_report,
    "export": _run_export,
    "demo": _run_demo,
}


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code (see the module docstring)."""
    arguments = list(sys.argv[1:] if argv is None else argv)
    if arguments and arguments[0] == "serve":
        # The only place the client touches the service, imported lazily so that a client
        # install does not pay for (or need) the server's dependencies.
        from leadline.service.server import main as serve

        return int(serve(arguments[1:]))
    if arguments and arguments[0] == "check":
        # Like serve: a server-side tool (it opens the data directory), imported lazily.
        from leadline.service.check import main as check

        return int(check(arguments[1:]))
    try:
        args = build_parser().parse_args(arguments)
    except _UsageError as error:
        print(error, file=sys.stderr)
        return EXIT_ERROR
    logging.basicConfig(
        level=logging.INFO if getattr(args, "verbose", False) else logging.WARNING,
        format="%(asctime)s %(levelname)s %(name)s: %(message)s",
    )
    try:
        return _COMMANDS[args.command](args)
    except _UsageError as error:
        print(error, file=sys.stderr)
    except LeadlineError as error:
        print(f"leadline {args.command}: {error}", file=sys.stderr)
    except (ValueError, OSError) as error:
        print(f"leadline {args.command}: {error}", file=sys.stderr)
    return EXIT_ERROR


if __name__ == "__main__":
    sys.exit(main())
