"""Process wiring: config, auth, store, engine, gRPC server, health, metrics, shutdown.

``main(argv)`` implements ``leadline serve`` (also ``python -m leadline.service serve``);
``start_server(config)`` starts everything in-process and returns a :class:`RunningServer`
(tests use it with port 0).
"""

from __future__ import annotations

import argparse
import ctypes
import dataclasses
import json
import logging
import os
import signal
import socket
import ssl
import sys
import threading
import time
from collections.abc import Callable
from concurrent import futures
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, NoReturn

import grpc
from grpc_health.v1 import health, health_pb2, health_pb2_grpc

from leadline.service.api import (
    Authenticator,
    AuthInterceptor,
    Readiness,
    ReadinessInterceptor,
    add_servicers,
    load_tokens,
)
from leadline.service.config import ServerConfig, is_loopback_host, load_config, split_host_port
from leadline.service.engine import Engine, RefitWorker
from leadline.service.metrics import Metrics, MetricsServer
from leadline.service.store import Database, DataDirectoryError
from leadline.service.store import records as store_records
from leadline.service.store.directory import restore_hint

__all__ = ["RunningServer", "ServerConfig", "main", "start_server"]

_LOG = logging.getLogger(__name__)

# The `leadline` command's exit code for an error (0 and 1-2 belong to gate verdicts).
_EXIT_ERROR = 3


@dataclass
class RunningServer:
    """A started server. ``stop`` is idempotent."""

    port: int
    address: str
    metrics_port: int
    _server: grpc.Server = field(repr=False)
    _health: health.HealthServicer = field(repr=False)
    _engine: Engine = field(repr=False)
    _worker: RefitWorker = field(repr=False)
    _database: Database = field(repr=False)
    _metrics: MetricsServer | None = field(repr=False, default=None)
    _stopped: bool = field(repr=False, default=False)
    _lock: threading.Lock = field(repr=False, default_factory=threading.Lock)

    @property
    def engine(self) -> Engine:
        return self._engine

    def stop(self, grace: float = 5.0) -> None:
        """Graceful shutdown: NOT_SERVING, refuse new calls, let in-flight calls finish
        (up to ``grace`` seconds), stop refits, flush and checkpoint the database."""
        with self._lock:
            if self._stopped:
                return
            self._stopped = True
        started = time.monotonic()
        _LOG.info("shutting down (grace %.1f s)", grace)
        self._health.enter_graceful_shutdown()
        self._server.stop(grace).wait()
        self._engine.close()
        # A refit still fitting after this is dropped (it cannot write any more) and is
        # redone after the next start.
        self._worker.stop(timeout=max(grace, 1.0))
        if self._metrics is not None:
            self._metrics.stop()
        self._database.close()
        _LOG.info("stopped in %.2f s", time.monotonic() - started)


def _token_table(config: ServerConfig, host: str) -> dict[str, frozenset[str]] | None:
    """The tokens to accept, or None when authentication is off (loopback only)."""
    if config.tokens is not None:
        tokens = load_tokens(config.tokens, allow_readable=config.allow_readable_tokens)
        _LOG.info("loaded %d tokens from %s", len(tokens), config.tokens)
        return tokens
    if not config.insecure_no_auth:
        raise ValueError(
            "tokens: no token file given; pass --tokens FILE, or --insecure-no-auth on a "
            "loopback address for local experiments."
        )
    if not is_loopback_host(host):
        raise ValueError(
            f"insecure_no_auth: refused on non-loopback address {config.listen!r}; "
            "authentication may be switched off only on 127.0.0.1, ::1 or localhost."
        )
    _LOG.warning(
        "AUTHENTICATION IS OFF (--insecure-no-auth): every caller gets every role. "
        "Use only for local experiments."
    )
    return None


def _check_key_pair(cert: Path, key: Path) -> None:
    """ValueError when the key does not belong to the certificate, or either is not PEM.

    gRPC reports these only as a failure to bind the port; Python's ssl module (OpenSSL)
    names the actual problem.
    """

    def no_password() -> bytes:
        raise ValueError("encrypted key")

    context = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    try:
        context.load_cert_chain(cert, key, password=no_password)
    except ValueError:
        raise ValueError(
            f"tls_key = {str(key)!r}: the key is encrypted; gRPC needs an unencrypted PEM key "
            "(protect it with file permissions instead)."
        ) from None
    except ssl.SSLError as error:
        if "KEY_VALUES_MISMATCH" in str(error) or "key values mismatch" in str(error):
            raise ValueError(
                f"tls_cert = {str(cert)!r}, tls_key = {str(key)!r}: the key does not belong to "
                "the certificate (their public keys differ); give the key the certificate "
                "was issued for."
            ) from None
        raise ValueError(
            f"tls_cert = {str(cert)!r}, tls_key = {str(key)!r}: not a usable PEM certificate "
            f"chain and private key ({error.reason or error})."
        ) from None


def _credentials(config: ServerConfig) -> grpc.ServerCredentials | None:
    if config.tls_cert is None or config.tls_key is None:
        return None
    try:
        cert = config.tls_cert.read_bytes()
        key = config.tls_key.read_bytes()
        client_ca = config.tls_client_ca.read_bytes() if config.tls_client_ca else None
    except OSError as error:
        raise ValueError(f"TLS files: cannot read ({error}).") from None
    _check_key_pair(config.tls_cert, config.tls_key)
    return grpc.ssl_server_credentials(
        [(key, cert)], root_certificates=client_ca, require_client_auth=client_ca is not None
    )


def _load_engine(
    engine: Engine,
    database: Database,
    auth: Authenticator,
    progress: Callable[[int, int], None],
) -> None:
    """Rebuild the pools from the database; DataDirectoryError when its content does not
    hold together (a damaged file SQLite's quick check did not catch)."""
    renames = auth.legacy_renames()
    if renames:
        renamed = database.write(store_records.rename_holders(renames))
        if renamed:
            _LOG.info("gave %d assignments keyed holder ids (data directory upgrade)", renamed)
    started = time.monotonic()
    try:
        engine.load(progress=progress)
    except Exception as error:
        # The traceback is for developers (--log-level DEBUG); the message says what to do.
        _LOG.debug("loading the pools from %s failed", database.path, exc_info=True)
        raise DataDirectoryError(
            f"{str(database.path)!r}: the stored pools do not load ({error}). "
            f"{restore_hint(database.data_dir)}"
        ) from None
    _LOG.info("loaded %d pools in %.2f s", len(engine.pools()), time.monotonic() - started)


def _check_can_bind(listen: str, host: str, port: int) -> None:
    """ValueError in plain words when ``host:port`` cannot be bound (e.g. already in use).

    gRPC's own failure reads "Failed to bind" plus a hint about its debug logging; the
    operating system's reason is what a person needs. Port 0 always binds.
    """
    if port == 0:
        return
    try:
        infos = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)
    except socket.gaierror as error:
        raise ValueError(
            f"listen = {listen!r}: cannot resolve {host!r} ({error.strerror}); use an "
            "address of this machine, e.g. 127.0.0.1:50051 or 0.0.0.0:50051."
        ) from None
    family, _, _, _, address = infos[0]
    with socket.socket(family, socket.SOCK_STREAM) as probe:
        probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            probe.bind(address)
        except OSError as error:
            reason = (error.strerror or str(error)).lower()
            raise ValueError(
                f"listen = {listen!r}: cannot bind ({reason}). Another leadline server or "
                "another program may listen there: stop it, or give this server another "
                "address with --listen HOST:PORT (or LEADLINE_LISTEN)."
            ) from None


def start_server(
    config: ServerConfig, *, on_listening: Callable[[str], None] | None = None
) -> RunningServer:
    """Open the data dir, listen, load the pools, then serve; returns once serving.

    The port listens before the pools load: meanwhile the health service reports
    NOT_SERVING and every leadline call gets UNAVAILABLE (see
    :mod:`leadline.service.api.readiness`). ``on_listening(address)`` is called from this
    thread once the port listens, before the pools load (``main`` prints a line there).

    Raises ValueError on bad configuration, DataDirectoryError when the data directory is
    in use by another server, damaged, or cannot be read.
    """
    host, port = split_host_port(config.listen)
    tokens = _token_table(config, host)
    credentials = _credentials(config)
    database = Database(config.data_dir)
    try:
        # Before anything else: a taken port fails at once, with the system's reason.
        _check_can_bind(config.listen, host, port)
        auth = Authenticator(tokens, holder_key=database.holder_key)
    except BaseException:
        database.close()
        raise
    engine = Engine(database, config)
    metrics = Metrics(engine, database)
    worker = engine.refit_worker()
    readiness = Readiness()
    server = grpc.server(
        futures.ThreadPoolExecutor(max_workers=config.max_workers, thread_name_prefix="rpc"),
        interceptors=[
            AuthInterceptor(auth, observe=metrics.observe),
            ReadinessInterceptor(readiness),
        ],
        options=[
            ("grpc.max_receive_message_length", config.max_message_bytes),
            ("grpc.max_send_message_length", config.max_message_bytes),
            ("grpc.so_reuseport", 0),
        ],
        maximum_concurrent_rpcs=config.max_workers * 8,
    )
    services = add_servicers(server, engine, config, auth, on_labels=worker.nudge)
    health_servicer = health.HealthServicer()
    health_pb2_grpc.add_HealthServicer_to_server(health_servicer, server)
    for name in ["", *services]:
        health_servicer.set(name, health_pb2.HealthCheckResponse.NOT_SERVING)
    if config.enable_reflection:
        from grpc_reflection.v1alpha import reflection

        reflection.enable_server_reflection(
            [*services, health.SERVICE_NAME, reflection.SERVICE_NAME], server
        )
    bind = f"[{host}]:{port}" if ":" in host else f"{host}:{port}"
    try:
        if credentials is None:
            bound = server.add_insecure_port(bind)
        else:
            bound = server.add_secure_port(bind, credentials)
    except RuntimeError as error:
        database.close()
        raise ValueError(f"listen = {config.listen!r}: cannot bind ({error}).") from None
    if bound == 0:
        database.close()
        raise ValueError(f"listen = {config.listen!r}: cannot bind (address in use?).")
    address = f"[{host}]:{bound}" if ":" in host else f"{host}:{bound}"
    metrics_server = None
    metrics_port = 0
    try:
        if config.metrics_listen:
            metrics_host, wanted = split_host_port(config.metrics_listen, name="metrics_listen")
            try:
                metrics_server = MetricsServer(metrics_host, wanted, metrics.render)
            except OSError as error:
                raise ValueError(
                    f"metrics_listen = {config.metrics_listen!r}: cannot bind ({error})."
                ) from None
            metrics_port = metrics_server.port
            metrics_server.start()
            _LOG.info("metrics on http://%s:%d/metrics", metrics_host, metrics_port)
        server.start()
        _LOG.info("listening on %s; loading the pools (health: NOT_SERVING)", address)
        if on_listening is not None:
            on_listening(address)
        _load_engine(engine, database, auth, readiness.progress)
    except BaseException:
        server.stop(None).wait()
        if metrics_server is not None:
            metrics_server.stop()
        database.close()
        raise
    worker.start()
    readiness.set_ready()
    for name in ["", *services]:
        health_servicer.set(name, health_pb2.HealthCheckResponse.SERVING)
    return RunningServer(
        port=bound,
        address=address,
        metrics_port=metrics_port,
        _server=server,
        _health=health_servicer,
        _engine=engine,
        _worker=worker,
        _database=database,
        _metrics=metrics_server,
    )


class _JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        entry: dict[str, Any] = {
            "time": self.formatTime(record, "%Y-%m-%dT%H:%M:%S"),
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
        }
        if record.exc_info:
            entry["error"] = self.formatException(record.exc_info)
        return json.dumps(entry)


# glibc's malloc serves a large block from its heaps once the block's size is below a
# threshold that rises (up to 32 MiB) every time such a block is freed; freed heap memory
# mostly stays with the process. After refits and draws over a million items that kept
# about twice the arrays' size resident. A fixed 1 MiB threshold gives every block of
# 1 MiB or more its own mapping, returned to the system when freed (docs/operations.md,
# "Sizing", has the measurements). MALLOC_MMAP_THRESHOLD_ in the environment wins.
_MMAP_THRESHOLD_BYTES = 1 << 20
_M_MMAP_THRESHOLD = -3  # mallopt's parameter number (glibc malloc.h)


def _settle_allocator() -> str:
    """Fix glibc's mmap threshold at 1 MiB unless the environment sets one; returns what
    was done (for the log)."""
    if "MALLOC_MMAP_THRESHOLD_" in os.environ:
        return "MALLOC_MMAP_THRESHOLD_ from the environment"
    try:
        libc = ctypes.CDLL("libc.so.6")
    except OSError:
        return "not glibc: the allocator's defaults"
    mallopt = getattr(libc, "mallopt", None)
    if mallopt is None or mallopt(_M_MMAP_THRESHOLD, _MMAP_THRESHOLD_BYTES) != 1:
        return "mallopt refused: the allocator's defaults"
    return f"mmap threshold fixed at {_MMAP_THRESHOLD_BYTES} bytes"


def _setup_logging(config: ServerConfig) -> None:
    handler = logging.StreamHandler(sys.stderr)
    if config.log_format == "json":
        handler.setFormatter(_JsonFormatter())
    else:
        handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    root = logging.getLogger()
    root.handlers[:] = [handler]
    root.setLevel(config.log_level.upper())


_HELP = {
    "data_dir": "directory of the database (created if missing)",
    "listen": "gRPC address HOST:PORT; port 0 picks a free port",
    "tokens": "TOML token file: [tokens] token = [roles]",
    "allow_readable_tokens": "start even if other users may read the token file",
    "insecure_no_auth": "no authentication (loopback addresses only)",
    "tls_cert": "PEM certificate chain: serve TLS",
    "tls_key": "PEM private key of --tls-cert",
    "tls_client_ca": "PEM CA bundle: require client certificates (mutual TLS)",
    "metrics_listen": "loopback HOST:PORT for Prometheus metrics at /metrics",
    "enable_reflection": "turn on gRPC server reflection",
    "refit_every_labels": "refit the surrogate after this many new labels",
    "refit_interval_seconds": "... or after this many seconds with new labels",
    "refit_cpu_share": "either way, a pool's refits take at most this share of one core",
    "default_lease_seconds": "lease when neither request nor pool sets one",
    "selection_floor": "defensive floor of the selection when the pool sets none",
    "default_confidence": "confidence when neither request nor pool sets one",
    "max_batch_items": "items per IngestItems call",
    "max_message_bytes": "gRPC message size limit",
    "max_workers": "gRPC worker threads",
    "shutdown_grace_seconds": "time in-flight calls get after SIGTERM",
    "log_level": "DEBUG, INFO, WARNING or ERROR",
    "log_format": "text or json",
    "surrogate_threads": "LightGBM threads of a refit (1 or 2)",
    "draw_seed": "0 = random pool seeds; else seeds derive from it (reproducible draws)",
    "request_retention_hours": "how long a write's request_id is remembered",
}


class _Parser(argparse.ArgumentParser):
    """Bad flags raise ValueError (exit 3 with one line) instead of argparse's exit 2."""

    def error(self, message: str) -> NoReturn:
        raise ValueError(f"{message} (see leadline serve --help)")


def _parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="leadline serve",
        description="Run the leadline server. Settings come from defaults, then --config, "
        "then LEADLINE_* environment variables, then these flags.",
    )
    parser.add_argument("--config", type=Path, help="TOML config file")
    for item in dataclasses.fields(ServerConfig):
        flag = "--" + item.name.replace("_", "-")
        if "bool" in str(item.type):
            parser.add_argument(
                flag, dest=item.name, action="store_true", default=None, help=_HELP[item.name]
            )
        else:
            # The default shown is the one in force: ServerConfig's own (one owner).
            shown = item.default not in (dataclasses.MISSING, None, "", 0)
            parser.add_argument(
                flag,
                dest=item.name,
                default=None,
                metavar=item.name.split("_")[-1].upper(),
                help=_HELP[item.name] + (f" (default {item.default})" if shown else ""),
            )
    return parser


def main(argv: list[str] | None = None) -> int:
    """``leadline serve ...``: run until SIGTERM / SIGINT, then shut down gracefully.

    Exit codes are the ``leadline`` command's (2 is an UNDECIDED gate there): 0 on a clean
    stop, 3 on any error: bad flags or configuration, or a data directory that cannot be
    served (in use by another server, damaged, unreadable).
    """
    args = list(sys.argv[1:] if argv is None else argv)
    if args[:1] == ["serve"]:
        args = args[1:]
    try:
        namespace = _parser().parse_args(args)
        overrides = {k: v for k, v in vars(namespace).items() if k != "config"}
        config = load_config(config_file=namespace.config, overrides=overrides)
    except ValueError as error:
        print(f"leadline serve: {error}", file=sys.stderr)
        return _EXIT_ERROR
    _setup_logging(config)
    _LOG.info("allocator: %s", _settle_allocator())
    stop = threading.Event()

    def on_signal(number: int, _frame: object) -> None:
        _LOG.info("received signal %d", number)
        stop.set()

    previous = {sig: signal.signal(sig, on_signal) for sig in (signal.SIGTERM, signal.SIGINT)}
    try:
        try:
            running = start_server(
                config,
                on_listening=lambda address: print(
                    f"leadline loading pools; gRPC on {address} answers UNAVAILABLE and health "
                    "NOT_SERVING until they are loaded",
                    file=sys.stderr,
                    flush=True,
                ),
            )
        except (ValueError, DataDirectoryError) as error:
            print(f"leadline serve: {error}", file=sys.stderr)
            return _EXIT_ERROR
        print(f"leadline listening on {running.address}", file=sys.stderr, flush=True)
        while not stop.wait(0.5):
            pass
        running.stop(grace=config.shutdown_grace_seconds)
        return 0
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)
