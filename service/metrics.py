"""Prometheus text exposition (format 0.0.4) on a separate loopback port, stdlib only.

Request counters and latency histograms are fed by the auth interceptor, labelled with
the short method name (``GetPool``) from a closed set (:func:`method_label`); pool gauges
(items, labels, pending, skipped, draws, surrogate version and lag, whole-pool risk
estimate and its bounds), refit (seconds, CPU seconds) and commit counters are read
from the engine at scrape time. The bounds carry a ``bound`` label saying which they
are: ``fixed-time`` (valid at one look) or ``anytime`` (valid however often it is read),
both two-sided at the pool's default confidence.
"""

from __future__ import annotations

import bisect
import logging
import threading
from collections.abc import Callable
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

import grpc

from leadline.service.engine import Engine, Scope
from leadline.service.errors import ServiceError
from leadline.service.store import Database
from leadline.v1 import leadline_pb2 as pb

__all__ = ["UNKNOWN_METHOD", "Metrics", "MetricsServer", "method_label"]

_LOG = logging.getLogger(__name__)

# Seconds; common practice for RPC latencies (no source).
_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)


# Label values come from a closed set: the server's own methods and one bucket for the
# rest, so calls with made-up method names (refused without a token) cannot add series.
UNKNOWN_METHOD = "unknown"
_KNOWN_METHODS = frozenset(
    {
        f"/{service.full_name}/{method.name}"
        for service in pb.DESCRIPTOR.services_by_name.values()
        for method in service.methods
    }
    | {"/grpc.health.v1.Health/Check", "/grpc.health.v1.Health/Watch"}
)


def method_label(method: str) -> str:
    """The ``method`` label of a call: the short method name (``GetPool``) if the path is
    one of ours, else "unknown"."""
    return method.rsplit("/", 1)[-1] if method in _KNOWN_METHODS else UNKNOWN_METHOD


def _label(value: str) -> str:
    return value.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")


class Metrics:
    """Request metrics plus scrape-time gauges from the engine and the database."""

    def __init__(self, engine: Engine, database: Database) -> None:
        self._engine = engine
        self._database = database
        self._lock = threading.Lock()
        self._requests: dict[tuple[str, str], int] = {}
        self._latency: dict[str, list[int]] = {}
        self._latency_sum: dict[str, float] = {}
        self._latency_count: dict[str, int] = {}

    def observe(self, method: str, code: grpc.StatusCode, seconds: float) -> None:
        """Count one finished call (wired as the interceptor's ``observe``); ``method`` is
        the full path ``/leadline.v1.PoolService/GetPool`` (see :func:`method_label`)."""
        method = method_label(method)
        with self._lock:
            key = (method, code.name)
            self._requests[key] = self._requests.get(key, 0) + 1
            buckets = self._latency.setdefault(method, [0] * len(_BUCKETS))
            position = bisect.bisect_left(_BUCKETS, seconds)
            if position < len(_BUCKETS):
                buckets[position] += 1
            self._latency_sum[method] = self._latency_sum.get(method, 0.0) + seconds
            self._latency_count[method] = self._latency_count.get(method, 0) + 1

    def render(self) -> str:
        lines: list[str] = []

        def family(name: str, kind: str, help_text: str) -> None:
            lines.append(f"# HELP {name} {help_text}")
            lines.append(f"# TYPE {name} {kind}")

        with self._lock:
            requests = dict(self._requests)
            latency = {k: list(v) for k, v in self._latency.items()}
            sums = dict(self._latency_sum)
            counts = dict(self._latency_count)
        family("leadline_requests_total", "counter", "Finished gRPC calls by method and code.")
        for (method, code), value in sorted(requests.items()):
            lines.append(
                f'leadline_requests_total{{method="{_label(method)}",code="{code}"}} {value}'
            )
        family("leadline_request_seconds", "histogram", "gRPC call latency in seconds.")
        for method, buckets in sorted(latency.items()):
            running = 0
            for bound, count in zip(_BUCKETS, buckets, strict=True):
                running += count
                lines.append(
                    f'leadline_request_seconds_bucket{{method="{_label(method)}",le="{bound}"}}'
                    f" {running}"
                )
            lines.append(
                f'leadline_request_seconds_bucket{{method="{_label(method)}",le="+Inf"}}'
                f" {counts[method]}"
            )
            lines.append(
                f'leadline_request_seconds_sum{{method="{_label(method)}"}} {sums[method]}'
            )
            lines.append(
                f'leadline_request_seconds_count{{method="{_label(method)}"}} {counts[method]}'
            )
        gauges: dict[str, list[str]] = {
            "leadline_pool_items": [],
            "leadline_pool_labels": [],
            "leadline_pool_pending": [],
            "leadline_pool_skipped": [],
            "leadline_pool_draws": [],
            "leadline_pool_surrogate_version": [],
            "leadline_pool_surrogate_lag_labels": [],
            "leadline_pool_risk": [],
            "leadline_pool_risk_lower": [],
            "leadline_pool_risk_upper": [],
        }
        for pool in self._engine.pools():
            try:
                info = self._engine.pool_info(pool)
            except ServiceError:
                continue
            tag = f'{{pool="{_label(pool.pool_id)}"}}'
            gauges["leadline_pool_items"].append(f"leadline_pool_items{tag} {info.item_count}")
            gauges["leadline_pool_labels"].append(f"leadline_pool_labels{tag} {info.labeled_count}")
            gauges["leadline_pool_pending"].append(
                f"leadline_pool_pending{tag} {info.pending_count}"
            )
            gauges["leadline_pool_skipped"].append(
                f"leadline_pool_skipped{tag} {info.skipped_count}"
            )
            gauges["leadline_pool_draws"].append(f"leadline_pool_draws{tag} {info.draw_count}")
            gauges["leadline_pool_surrogate_version"].append(
                f"leadline_pool_surrogate_version{tag} {info.surrogate_version}"
            )
            gauges["leadline_pool_surrogate_lag_labels"].append(
                f"leadline_pool_surrogate_lag_labels{tag} "
                f"{info.labeled_count - info.surrogate_label_count}"
            )
            if info.item_count:
                try:
                    estimate = self._engine.estimate(pool.pool_id, Scope()).estimate
                except Exception:  # noqa: BLE001 - a scrape must not fail for one pool
                    _LOG.exception("estimate for metrics failed for pool %s", pool.pool_id)
                    continue
                gauges["leadline_pool_risk"].append(f"leadline_pool_risk{tag} {estimate.risk}")
                pool_label = _label(pool.pool_id)
                for kind, lower, upper in (
                    ("fixed-time", estimate.lower, estimate.upper),
                    ("anytime", estimate.anytime_lower, estimate.anytime_upper),
                ):
                    tags = f'{{pool="{pool_label}",bound="{kind}"}}'
                    gauges["leadline_pool_risk_lower"].append(
                        f"leadline_pool_risk_lower{tags} {lower}"
                    )
                    gauges["leadline_pool_risk_upper"].append(
                        f"leadline_pool_risk_upper{tags} {upper}"
                    )
        helps = {
            "leadline_pool_items": "Items in the pool.",
            "leadline_pool_labels": "Labeled draws.",
            "leadline_pool_pending": "Draws assigned or waiting, not yet labeled.",
            "leadline_pool_skipped": "Draws the labeler skipped.",
            "leadline_pool_draws": "Draws made.",
            "leadline_pool_surrogate_version": "Current surrogate version.",
            "leadline_pool_surrogate_lag_labels": "Labels the surrogate in force was not "
            "fitted on (labeled draws minus its label count).",
            "leadline_pool_risk": "Whole-pool risk estimate in the pool's default mode.",
            "leadline_pool_risk_lower": "Lower end of that estimate's two-sided interval at "
            "the pool's default confidence; label bound: fixed-time (one look) or anytime "
            "(however often read).",
            "leadline_pool_risk_upper": "Upper end of that estimate's two-sided interval at "
            "the pool's default confidence; label bound: fixed-time (one look) or anytime "
            "(however often read).",
        }
        for name, rows in gauges.items():
            family(name, "gauge", helps[name])
            lines.extend(rows)
        family("leadline_refits_total", "counter", "Surrogate refits completed.")
        lines.append(f"leadline_refits_total {self._engine.refit_count}")
        family("leadline_refit_seconds_total", "counter", "Seconds spent in refits.")
        lines.append(f"leadline_refit_seconds_total {self._engine.refit_seconds_total}")
        family(
            "leadline_refit_cpu_seconds_total",
            "counter",
            "CPU seconds of the refit thread (its rate is the share of one core refits take).",
        )
        lines.append(f"leadline_refit_cpu_seconds_total {self._engine.refit_cpu_seconds_total}")
        family("leadline_store_commits_total", "counter", "SQLite group commits.")
        lines.append(f"leadline_store_commits_total {self._database.commits}")
        family(
            "leadline_store_write_failures_total",
            "counter",
            "Writes the database refused for a reason of its own (disk full, I/O error).",
        )
        lines.append(f"leadline_store_write_failures_total {self._database.store_failures}")
        family(
            "leadline_store_refusing_writes",
            "gauge",
            "1 while writes are refused after a store failure, until a probe write commits.",
        )
        lines.append(f"leadline_store_refusing_writes {int(self._database.failure is not None)}")
        family(
            "leadline_pool_reloads_total",
            "counter",
            "Pools rebuilt from the database after a write of theirs was not saved.",
        )
        lines.append(f"leadline_pool_reloads_total {self._engine.reload_count}")
        return "\n".join(lines) + "\n"


class MetricsServer:
    """``GET /metrics`` on ``host:port`` in a daemon thread."""

    def __init__(self, host: str, port: int, render: Callable[[], str]) -> None:
        class Handler(BaseHTTPRequestHandler):
            def do_GET(self) -> None:  # noqa: N802 - http.server's naming
                if self.path.split("?")[0] != "/metrics":
                    self.send_error(404, "only /metrics is served here")
                    return
                body = render().encode()
                self.send_response(200)
                self.send_header("Content-Type", "text/plain; version=0.0.4; charset=utf-8")
                self.send_header("Content-Length", str(len(body)))
                self.end_headers()
                self.wfile.write(body)

            def log_message(self, format: str, *args: object) -> None:  # noqa: A002
                _LOG.debug("metrics: " + format, *args)

        self._server = ThreadingHTTPServer((host, port), Handler)
        self._server.daemon_threads = True
        self.port = int(self._server.server_address[1])
        self._thread = threading.Thread(
            target=self._server.serve_forever, name="leadline-metrics", daemon=True
        )

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        self._server.shutdown()
        self._server.server_close()
