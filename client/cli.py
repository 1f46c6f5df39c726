"""The ``leadline`` command.

Exit codes, for scripts and CI: 0 success; 3 error (bad arguments, server unreachable, a
refused call). ``leadline gate`` adds 1 for FAIL and 2 for UNDECIDED (0 is PASS).

Connection settings come from flags or the environment: ``--target`` /
``LEADLINE_TARGET`` (host:port), ``--token`` / ``LEADLINE_TOKEN`` (or ``--token-file``),
``--tls`` / ``--tls-ca`` / ``--tls-cert`` / ``--tls-key`` for TLS and mutual TLS.
``leadline serve`` runs the server itself and takes the server's own flags; ``leadline
check --data-dir DIR`` checks a server's database (both load the server's modules, the
other commands do not).

Every command names its pool with ``--pool``. ``--json`` prints our own flat JSON (plain
numbers, lower-case enum words; the keys are listed in the README and kept stable).
"""

from __future__ import annotations

import argparse
import csv
import json
import logging
import os
import re
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from importlib import metadata
from pathlib import Path
from typing import Any, NoReturn

import grpc
import numpy as np

from leadline.client._client import Client, pool_name
from leadline.client._enums import choices, enum_name
from leadline.client._errors import AlreadyExists, LeadlineError, Unavailable
from leadline.client._results import Estimate, GateResult, Verdict
from leadline.client._tls import TlsConfig
from leadline.client.export import write_draws_csv
from leadline.v1 import leadline_pb2

__all__ = ["DEFAULT_TARGET", "EXIT_ERROR", "EXIT_FAIL", "EXIT_PASS", "EXIT_UNDECIDED", "main"]

_LOG = logging.getLogger(__name__)

DEFAULT_TARGET = "localhost:50051"
EXIT_PASS = 0
EXIT_FAIL = 1
EXIT_UNDECIDED = 2
EXIT_ERROR = 3
_GATE_EXIT = {Verdict.PASS: EXIT_PASS, Verdict.FAIL: EXIT_FAIL, Verdict.UNDECIDED: EXIT_UNDECIDED}

# The request field (as the server and the client name it in messages) -> the flag that
# sets it. Errors for a CLI command are told in the command line's own words.
_FLAGS = {
    "pool_id": "--pool",
    "pool": "--pool",
    "name": "--pool",
    "pool.task": "--task",
    "pool.feature_dim": "--features",
    "pool.num_classes": "--classes",
    "pool.loss": "--loss",
    "pool.cost_matrix": "--cost-matrix",
    "pool.loss_cap": "--loss-cap",
    "pool.default_mode": "--default-mode",
    "pool.description": "--description",
    "pool.selection_floor": "--selection-floor",
    "pool.default_lease_seconds": "--default-lease-seconds",
    "pool.default_confidence": "--default-confidence",
    "pool.refit_every_labels": "--refit-every-labels",
    "max_risk": "--max-risk",
    "confidence": "--confidence",
    "mode": "--mode",
    "bound": "--bound",
    "segment": "--segment",
    "timeout": "--timeout",
    "target": "--target",
}
# Proto enum value names (LOSS_KIND_SQUARED_ERROR, or the bare SQUARED_ERROR) -> CLI words.
_ENUM_PREFIXES = {
    "TaskType": "TASK_TYPE_",
    "LossKind": "LOSS_KIND_",
    "EstimatorMode": "ESTIMATOR_MODE_",
    "BoundKind": "BOUND_KIND_",
}
_ENUM_WORDS = {
    key: word
    for enum_type, prefix in _ENUM_PREFIXES.items()
    for word in choices(enum_type)
    for key in (prefix + word.upper().replace("-", "_"), word.upper().replace("-", "_"))
}
_HEAD = re.compile(r"(?P<field>[a-z_][a-z0-9_.]*)(?P<sep> = |: | has )")


class _UsageError(Exception):
    """Bad command-line arguments (argparse would exit 2, which means UNDECIDED here)."""


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> NoReturn:
        raise _UsageError(f"{self.prog}: {message}")


def _version() -> str:
    try:
        return metadata.version("leadline")
    except metadata.PackageNotFoundError:  # running from a source tree without install
        return "unknown"


def _connection_options() -> _Parser:
    common = _Parser(add_help=False)
    group = common.add_argument_group("connection")
    group.add_argument(
        "--target",
        default=None,
        help=f"server HOST:PORT (env LEADLINE_TARGET; default {DEFAULT_TARGET})",
    )
    group.add_argument(
        "--token",
        default=None,
        help="bearer token (env LEADLINE_TOKEN; prefer the environment or --token-file, "
        "a command line is visible to other users)",
    )
    group.add_argument("--token-file", type=Path, help="read the bearer token from this file")
    group.add_argument(
        "--timeout",
        type=float,
        default=30.0,
        help="deadline of each call in seconds (default %(default)s); a server that does "
        "not answer at all is reported within a few seconds",
    )
    group.add_argument("--tls", action="store_true", help="use TLS with the system's CA roots")
    group.add_argument("--tls-ca", type=Path, help="CA certificate (PEM) to check the server")
    group.add_argument("--tls-cert", type=Path, help="client certificate (PEM) for mutual TLS")
    group.add_argument("--tls-key", type=Path, help="client private key (PEM) for mutual TLS")
    group.add_argument("--tls-server-name", help="name to check in the server's certificate")
    group.add_argument("-v", "--verbose", action="store_true", help="log progress to stderr")
    return common


def _pool_option(parser: argparse.ArgumentParser, *, help: str = "pool id or pools/ID") -> None:
    parser.add_argument("--pool", required=True, help=help)


def _json_option(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--json", action="store_true", help="print flat JSON (stable keys, see the README)"
    )


def build_parser() -> argparse.ArgumentParser:
    """The full command-line parser (``serve`` is forwarded before parsing)."""
    common = _connection_options()
    parser = _Parser(
        prog="leadline",
        description="Label-efficient risk estimates and release gates for deployed models.",
        epilog="Exit codes: 0 success, 3 error; gate: 0 PASS, 1 FAIL, 2 UNDECIDED, 3 error.",
    )
    parser.add_argument(
        "--version", action="version", version=f"leadline {_version()}", help="print the version"
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
    create = pool_commands.add_parser(
        "create",
        parents=[common],
        help="create a pool",
        description="Create a pool. Each flag sets the pool setting named in its help; "
        "--default-* flags override the server setting of the same name for this pool.",
    )
    _pool_option(create, help="new pool id: [a-z][a-z0-9-]{0,62}")
    create.add_argument(
        "--task", required=True, choices=choices("TaskType"), help="the model's task (task)"
    )
    create.add_argument(
        "--features", type=int, required=True, help="feature vector length (feature_dim)"
    )
    create.add_argument(
        "--classes", type=int, default=0, help="number of classes, classification (num_classes)"
    )
    create.add_argument(
        "--loss", required=True, choices=choices("LossKind"), help="per-item loss (loss)"
    )
    create.add_argument(
        "--cost-matrix",
        help="cost-matrix loss: rows separated by ';', values by ',', row = predicted "
        "(cost_matrix)",
    )
    create.add_argument(
        "--loss-cap",
        type=float,
        default=0.0,
        help="regression: losses are clipped to [0, cap] (loss_cap)",
    )
    create.add_argument(
        "--default-mode",
        choices=choices("EstimatorMode"),
        help="estimator when a request names none (default_mode; server default balanced)",
    )
    create.add_argument("--description", default="", help="free text shown in reports")
    create.add_argument(
        "--selection-floor",
        type=float,
        default=0.0,
        help="defensive floor of the selection in (0, 1] (selection_floor; 0 = the server's)",
    )
    create.add_argument(
        "--default-lease-seconds",
        type=int,
        default=0,
        help="lease of an assignment (default_lease_seconds; 0 = the server's)",
    )
    create.add_argument(
        "--default-confidence",
        type=float,
        default=0.0,
        help="confidence when a request gives none (default_confidence; 0 = the server's)",
    )
    create.add_argument(
        "--refit-every-labels",
        type=int,
        default=0,
        help="new labels between surrogate refits (refit_every_labels; 0 = the server's)",
    )
    create.add_argument(
        "--exist-ok",
        action="store_true",
        help="a pool with this id that already exists is fine (it is left as it is)",
    )
    listing = pool_commands.add_parser("list", parents=[common], help="list pools")
    _json_option(listing)
    show = pool_commands.add_parser("show", parents=[common], help="show one pool")
    _pool_option(show)
    _json_option(show)
    delete = pool_commands.add_parser("delete", parents=[common], help="delete a pool")
    _pool_option(delete)
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
    _pool_option(add)
    add.add_argument("--file", type=Path, required=True, help="rows.npz or rows.csv")
    add.add_argument(
        "--request-id", help="makes a repeat of this upload harmless (same file, same id)"
    )

    status = commands.add_parser(
        "status", parents=[common], help="pool counts, labels, surrogate and current estimate"
    )
    _pool_option(status)
    status.add_argument(
        "--confidence", type=float, default=0.0, help="of the intervals (0 = the pool's default)"
    )
    status.add_argument(
        "--mode", choices=choices("EstimatorMode"), help="estimator (default: the pool's)"
    )
    _json_option(status)

    gate = commands.add_parser(
        "gate",
        parents=[common],
        help="release gate: exit 0 PASS, 1 FAIL, 2 UNDECIDED, 3 error",
        description="Is the pool's risk below --max-risk at --confidence? Exit 0 PASS, "
        "1 FAIL, 2 UNDECIDED, 3 error. The verdict rests on one-sided bounds at "
        "--confidence: PASS when the upper bound is below --max-risk, FAIL when the lower "
        "bound is above it.",
    )
    _pool_option(gate)
    gate.add_argument(
        "--max-risk",
        type=float,
        required=True,
        help="threshold, in (0, B) with B the pool's largest possible loss",
    )
    gate.add_argument(
        "--confidence", type=float, default=0.0, help="in (0.5, 1); 0 = the pool's default"
    )
    gate.add_argument(
        "--bound",
        choices=choices("BoundKind"),
        default="anytime",
        help="anytime (safe to poll, default) or fixed-time (one look only)",
    )
    gate.add_argument(
        "--mode", choices=choices("EstimatorMode"), help="estimator (default: the pool's)"
    )
    gate.add_argument("--segment", default="", help="decide for this segment only")
    gate.add_argument(
        "--wait",
        type=float,
        default=0.0,
        help="keep polling while UNDECIDED (or unreachable), up to this many seconds, "
        "printing one line per poll (anytime bound only)",
    )
    gate.add_argument(
        "--interval", type=float, default=30.0, help="seconds between polls (%(default)s)"
    )
    _json_option(gate)

    report = commands.add_parser("report", parents=[common], help="write a PNG + HTML report")
    _pool_option(report)
    report.add_argument("--out", type=Path, default=Path("reports"), help="output folder")
    report.add_argument(
        "--confidence", type=float, default=0.0, help="0 = the pool's default confidence"
    )
    report.add_argument(
        "--max-risk", type=float, help="also check this gate threshold and plot its bound"
    )
    report.add_argument(
        "--bound",
        choices=choices("BoundKind"),
        default="anytime",
        help="bound of that gate (default %(default)s)",
    )

    export = commands.add_parser("export", parents=[common], help="draws and labels as CSV")
    _pool_option(export)
    export.add_argument("--out", default="-", help="CSV file ('-' = standard output)")

    demo = commands.add_parser(
        "demo", help="end-to-end demo against a real local server (invented scenario)"
    )
    demo.add_argument(
        "--out", type=Path, default=Path("reports") / "demo", help="folder for the report"
    )
    demo.add_argument("--seed", type=int, default=7, help="scenario and draw seed")
    demo.add_argument("--items", type=int, default=20_000, help="pool size")
    demo.add_argument("--budget", type=int, default=800, help="most labels the vendor gives")
    demo.add_argument("-v", "--verbose", action="store_true", help="log progress to stderr")
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


# -- connection -----------------------------------------------------------------------------


@dataclass(frozen=True)
class _Token:
    value: str | None
    source: str  # how the user gave it, in CLI words


def _token(args: argparse.Namespace) -> _Token:
    if args.token_file is not None:
        path = args.token_file
        try:
            text = path.read_text(encoding="utf-8").strip()
        except OSError as error:
            raise _UsageError(
                f"--token-file {str(path)!r}: cannot read it ({error.strerror or error})."
            ) from None
        if not text:
            raise _UsageError(f"--token-file {str(path)!r} is empty; put the token in it.")
        return _Token(text, f"--token-file {path}")
    if args.token:
        return _Token(args.token, "--token")
    if os.environ.get("LEADLINE_TOKEN"):
        return _Token(os.environ["LEADLINE_TOKEN"], "LEADLINE_TOKEN")
    return _Token(None, "")


def _target(args: argparse.Namespace) -> tuple[str, str]:
    """The target and the words naming where it came from."""
    if args.target is not None:
        return args.target, "--target"
    if "LEADLINE_TARGET" in os.environ:
        return os.environ["LEADLINE_TARGET"], "LEADLINE_TARGET"
    return DEFAULT_TARGET, "--target"


def _client(args: argparse.Namespace) -> Client:
    target, target_source = _target(args)
    args.target_source = target_source
    token = _token(args)
    args.token_source = token.source
    tls: TlsConfig | bool = False
    if args.tls_ca or args.tls_cert or args.tls_key or args.tls_server_name:
        try:
            tls = TlsConfig.from_files(
                ca=args.tls_ca,
                cert=args.tls_cert,
                key=args.tls_key,
                server_name=args.tls_server_name,
            )
        except OSError as error:
            raise _UsageError(
                f"cannot read {error.filename}: {error.strerror or error} "
                "(--tls-ca / --tls-cert / --tls-key)."
            ) from None
    elif args.tls:
        tls = True
    return Client(target, token=token.value, tls=tls, timeout=args.timeout)


# -- output ---------------------------------------------------------------------------------


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


def describe_estimate(est: Estimate) -> str:
    """One line: estimate ± half-width with both two-sided intervals."""
    half = (est.upper - est.lower) / 2
    return (
        f"{est.risk:.4f} ± {half:.4f}  ({est.confidence:.0%} two-sided: fixed-time "
        f"{_interval(est.lower, est.upper)}; anytime "
        f"{_interval(est.anytime_lower, est.anytime_upper)})"
    )


def pool_dict(pool: leadline_pb2.Pool) -> dict[str, Any]:
    """A pool as flat JSON-ready values: proto field names, plain numbers, enum words."""
    values: dict[str, Any] = {}
    for field in pool.DESCRIPTOR.fields:
        value = getattr(pool, field.name)
        if field.enum_type is not None:
            values[field.name] = enum_name(field.enum_type.name, value)
        elif field.is_repeated:
            values[field.name] = list(value)
        else:
            values[field.name] = value
    return values


def _json(value: object) -> str:
    return json.dumps(value, indent=2)


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
        raise _UsageError(
            f"--cost-matrix {text!r}: rows separated by ';', numbers by ',' (e.g. '0,1;5,0')."
        ) from None


# -- commands -------------------------------------------------------------------------------


def _settings_differ(pool: leadline_pb2.Pool, args: argparse.Namespace) -> list[str]:
    """The asked settings an existing pool does not have, in flag words."""
    asked = {
        "--task": (enum_name("TaskType", pool.task), args.task),
        "--features": (pool.feature_dim, args.features),
        "--classes": (pool.num_classes, args.classes),
        "--loss": (enum_name("LossKind", pool.loss), args.loss),
        "--loss-cap": (pool.loss_cap, args.loss_cap),
    }
    return [f"{flag} {has} (asked {want})" for flag, (has, want) in asked.items() if has != want]


def _run_pool(args: argparse.Namespace) -> int:
    with _client(args) as client:
        if args.pool_command == "create":
            pool_id = pool_name(args.pool).removeprefix("pools/")
            try:
                pool = client.create_pool(
                    pool_id,
                    task=args.task,
                    feature_dim=args.features,
                    num_classes=args.classes,
                    loss=args.loss,
                    cost_matrix=_cost_matrix(args.cost_matrix),
                    loss_cap=args.loss_cap,
                    default_mode=args.default_mode,
                    description=args.description,
                    selection_floor=args.selection_floor,
                    default_lease_seconds=args.default_lease_seconds,
                    default_confidence=args.default_confidence,
                    refit_every_labels=args.refit_every_labels,
                )
            except AlreadyExists as error:
                if not args.exist_ok:
                    raise AlreadyExists(
                        f"{error.details} Add --exist-ok to accept a pool that already exists.",
                        code=error.code,
                        method=error.method,
                    ) from None
                pool = client.get_pool(pool_id)
                differ = _settings_differ(pool, args)
                note = f"; it differs from the flags given: {', '.join(differ)}" if differ else ""
                print(f"{pool.name} already existed; left as it is (--exist-ok){note}")
            else:
                print(f"created {pool.name}")
        elif args.pool_command == "list":
            pools = client.list_pools()
            if args.json:
                print(_json([pool_dict(p) for p in pools]))
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
            print(_json(pool_dict(pool)) if args.json else _table(_pool_rows(pool)))
        elif args.pool_command == "delete":
            if not args.yes:
                raise _UsageError(
                    f"leadline pool delete: deleting {pool_name(args.pool)} removes all its "
                    "items, draws and labels; add --yes to confirm."
                )
            client.delete_pool(args.pool)
            print(f"deleted {pool_name(args.pool)}")
    return 0


def _run_validation(args: argparse.Namespace) -> int:
    try:
        columns = read_validation_file(args.file)
    except ValueError as error:
        raise _UsageError(f"--file {error}") from None
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
    for problem in result.errors:
        print(f"  rejected {problem.item_id}: {problem.reason}")
    if result.accepted:
        print("  a surrogate refit on them starts now; the next draw waits for it")
    return 0


def _run_status(args: argparse.Namespace) -> int:
    with _client(args) as client:
        pool = client.get_pool(args.pool)
        est: Estimate | None
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
            "pool": pool_dict(pool),
            "estimate": est.to_dict() if est is not None else None,
            "segments": [{"segment": s, **e.to_dict()} for s, e in sorted(segments.items())],
        }
        print(_json(payload))
        return 0
    rows = _pool_rows(pool)
    if est is None:
        rows.append(("estimate", "none yet: the pool has no items"))
    else:
        rows += [
            ("estimate", describe_estimate(est)),
            (
                "mode",
                f"{est.mode} (unbiased weight {est.unbiased_weight:.2f}, bias bound "
                f"{est.bias_bound:.4f})",
            ),
            (
                "labels",
                f"{est.labels_used:,} used, {est.labels_pending:,} pending, "
                f"{est.labels_skipped:,} skipped (surrogate version {est.surrogate_version})",
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
        if est is not None:
            print(f"(intervals two-sided at {est.confidence:.0%})")
    return 0


def describe_gate(result: GateResult) -> list[str]:
    """The gate's lines: the bound the verdict used, labeled one-sided, then the labels."""
    est = result.estimate
    level = f"one-sided {est.confidence:.0%} {result.bound}"
    if result.verdict is Verdict.PASS:
        lines = [f"  {level} upper bound {result.upper:.4f} < {result.max_risk:g}"]
    elif result.verdict is Verdict.FAIL:
        lines = [f"  {level} lower bound {result.lower:.4f} > {result.max_risk:g}"]
    else:
        lines = [
            f"  {level} bounds {result.lower:.4f} (lower) and {result.upper:.4f} (upper) "
            f"lie on both sides of {result.max_risk:g}"
        ]
    lines.append(
        f"  estimate {est.risk:.4f} ({est.mode}), {est.labels_used:,} labels used, "
        f"{est.labels_pending:,} pending, {est.labels_skipped:,} skipped, surrogate version "
        f"{est.surrogate_version}"
    )
    if result.verdict is Verdict.UNDECIDED:
        if result.unlabeled == 0:
            lines.append("  every item in scope is labeled; more labels cannot decide it")
        elif result.labels_may_not_suffice:
            lines.append(
                f"  even labeling all {result.unlabeled:,} unlabeled items in scope may not "
                "decide it"
            )
        elif result.more_labels_hint:
            lines.append(f"  about {result.more_labels_hint:,} more labels may decide it (rough)")
    return lines


def _poll_line(result: GateResult | None, problem: str, args: argparse.Namespace) -> str:
    now = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    if result is None:
        return f"{now}  {problem}; polling again in {args.interval:g} s"
    est = result.estimate
    return (
        f"{now}  undecided: {est.labels_used:,} labels; one-sided {est.confidence:.0%} "
        f"{result.bound} bounds [{result.lower:.4f}, {result.upper:.4f}] vs --max-risk "
        f"{result.max_risk:g}; polling again in {args.interval:g} s"
    )


def _run_gate(args: argparse.Namespace) -> int:
    if args.wait > 0 and args.bound != "anytime":
        raise _UsageError(
            "leadline gate: --wait polls repeatedly, which only the anytime bound allows "
            f"(got --bound {args.bound})."
        )
    if not args.interval > 0:
        raise _UsageError(f"leadline gate: --interval {args.interval:g}: must be > 0.")
    if args.wait < 0:
        raise _UsageError(f"leadline gate: --wait {args.wait:g}: must be >= 0.")
    deadline = time.monotonic() + args.wait
    with _client(args) as client:
        while True:
            last_chance = time.monotonic() + args.interval > deadline
            try:
                result = client.check_gate(
                    args.pool,
                    max_risk=args.max_risk,
                    confidence=args.confidence,
                    bound=args.bound,
                    mode=args.mode,
                    segment=args.segment,
                )
            except Unavailable as error:
                # --wait keeps its patience with a server that is down or restarting.
                if last_chance:
                    raise
                print(_poll_line(None, error.details, args), file=sys.stderr, flush=True)
                time.sleep(args.interval)
                continue
            if result.verdict is not Verdict.UNDECIDED or last_chance:
                break
            print(_poll_line(result, "", args), file=sys.stderr, flush=True)
            time.sleep(args.interval)
    if args.json:
        payload = {"pool": pool_name(args.pool), "segment": args.segment, **result.to_dict()}
        print(_json(payload))
    else:
        scope = f" segment {args.segment}" if args.segment else ""
        verdict = str(result.verdict).upper()
        print(f"{verdict}: {pool_name(args.pool)}{scope}, risk below {args.max_risk:g}?")
        print("\n".join(describe_gate(result)))
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
    return 0


def _run_export(args: argparse.Namespace) -> int:
    with _client(args) as client:
        draws = client.iter_draws(args.pool)
        if args.out == "-":
            write_draws_csv(draws, sys.stdout)
        else:
            count = write_draws_csv(draws, args.out)
            print(f"wrote {count} draws to {args.out}", file=sys.stderr)
    return 0


def _run_demo(args: argparse.Namespace) -> int:
    from leadline.client.demo import run_demo

    return run_demo(out_dir=args.out, seed=args.seed, items=args.items, budget=args.budget)


_COMMANDS: dict[str, Callable[[argparse.Namespace], int]] = {
    "pool": _run_pool,
    "validation": _run_validation,
    "status": _run_status,
    "gate": _run_gate,
    "report": _run_report,
    "export": _run_export,
    "demo": _run_demo,
}


# -- errors in the command line's words -----------------------------------------------------


def _cli_words(details: str, args: argparse.Namespace) -> str:
    """A request's error told with the flag that set the value and the CLI's enum words."""
    flags = dict(_FLAGS)
    flags["target"] = getattr(args, "target_source", "--target")
    head = _HEAD.match(details)
    if head is not None and head.group("field") in flags:
        flag = flags[head.group("field")]
        separator = " " if head.group("sep") == " = " else head.group("sep")
        details = flag + separator + details[head.end() :]
    return re.sub(
        r"\b[A-Z][A-Z_]*[A-Z]\b", lambda m: _ENUM_WORDS.get(m.group(0), m.group(0)), details
    )


def _describe_error(error: LeadlineError, args: argparse.Namespace) -> str:
    code = error.code.name if error.code is not None else "ERROR"
    if error.code == grpc.StatusCode.UNAUTHENTICATED:
        source = getattr(args, "token_source", "")
        if not source:
            advice = (
                "no token was given: set LEADLINE_TOKEN or pass --token-file FILE (a token "
                "from the server's token file)"
            )
        else:
            advice = (
                f"the server does not know the token from {source}: use one listed in the "
                "server's token file (--tokens)"
            )
        return f"{code}: {advice}."
    return f"{code}: {_cli_words(error.details, args)}"


def _command_name(args: argparse.Namespace) -> str:
    sub = getattr(args, "pool_command", None) or getattr(args, "validation_command", None)
    return f"{args.command} {sub}" if sub else args.command


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code (see the module docstring)."""
    arguments = list(sys.argv[1:] if argv is None else argv)
    if arguments and arguments[0] == "serve":
        # The only place the client touches the service. Imported lazily: the server's
        # modules load scikit-learn and LightGBM, which the other commands never need, so
        # they start without that import time.
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
    name = _command_name(args)
    try:
        code = _COMMANDS[args.command](args)
        sys.stdout.flush()  # inside the try: a closed pipe surfaces here, not at exit
        return code
    except BrokenPipeError:
        # The reader went away (`leadline export | head`): stop quietly, like other Unix
        # tools. Point stdout at /dev/null so the interpreter's final flush cannot fail.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    except _UsageError as error:
        message = str(error)
        print(
            message if message.startswith("leadline") else f"leadline {name}: {message}",
            file=sys.stderr,
        )
    except LeadlineError as error:
        print(f"leadline {name}: {_describe_error(error, args)}", file=sys.stderr)
    except OSError as error:
        print(f"leadline {name}: {error}", file=sys.stderr)
    return EXIT_ERROR


if __name__ == "__main__":
    sys.exit(main())
