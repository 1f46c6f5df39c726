"""Server settings: defaults < TOML config file < ``LEADLINE_*`` environment < flags.

Every setting has one name used in all three places: the TOML key ``refit_every_labels``,
the environment variable ``LEADLINE_REFIT_EVERY_LABELS`` and the flag
``--refit-every-labels``. :func:`load_config` merges them and validates the result once.
"""

from __future__ import annotations

import dataclasses
import ipaddress
import os
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from leadline.service.estimation import DEFAULT_FLOOR

__all__ = ["ServerConfig", "load_config", "is_loopback_host", "split_host_port"]

_ENV_PREFIX = "LEADLINE_"
_TRUE = {"1", "true", "yes", "on"}
_FALSE = {"0", "false", "no", "off", ""}


@dataclass(frozen=True, kw_only=True)
class ServerConfig:
    """Everything the server needs to start. Paths are absolute after :func:`load_config`."""

    data_dir: Path
    listen: str = "127.0.0.1:50051"
    tokens: Path | None = None
    # Start even if other users may read the token file (e.g. a container's secret mount).
    allow_readable_tokens: bool = False
    insecure_no_auth: bool = False
    tls_cert: Path | None = None
    tls_key: Path | None = None
    tls_client_ca: Path | None = None
    metrics_listen: str = ""
    enable_reflection: bool = False
    # A background refit starts after this many new labels (pool setting overrides) ...
    refit_every_labels: int = 10
    # ... or when this many seconds passed since the last fit and new labels exist.
    refit_interval_seconds: float = 300.0
    # Either way only once a pool's refits take at most this share of one core: after a
    # refit of t CPU seconds the next waits t (1 - share) / share (engine/refit.py).
    refit_cpu_share: float = 0.25
    default_lease_seconds: int = 3600
    # Defensive floor epsilon of the selection when the pool does not set one.
    selection_floor: float = DEFAULT_FLOOR
    default_confidence: float = 0.95
    max_batch_items: int = 10_000
    max_message_bytes: int = 64 * 1024 * 1024
    max_workers: int = 16
    shutdown_grace_seconds: float = 10.0
    log_level: str = "INFO"
    log_format: str = "text"
    surrogate_threads: int = 1
    # 0: every new pool gets a random seed. Otherwise pool seeds derive from this value and
    # the pool id, so the same calls replay the same draws (audits, benchmarks, tests).
    draw_seed: int = 0
    # A write's request_id is remembered (for retries) this long, then forgotten.
    request_retention_hours: float = 168.0

    def __post_init__(self) -> None:
        _check(self)


def _check(config: ServerConfig) -> None:
    def bad(name: str, rule: str) -> ValueError:
        return ValueError(f"{name} = {getattr(config, name)!r}: {rule}.")

    split_host_port(config.listen, name="listen")
    if config.metrics_listen:
        host, _ = split_host_port(config.metrics_listen, name="metrics_listen")
        if not is_loopback_host(host):
            raise bad("metrics_listen", "metrics are served on a loopback address only")
    if (config.tls_cert is None) != (config.tls_key is None):
        raise ValueError("tls_cert and tls_key: give both or neither.")
    if config.tls_client_ca is not None and config.tls_cert is None:
        raise ValueError("tls_client_ca: needs tls_cert and tls_key (mutual TLS).")
    if config.refit_every_labels < 1:
        raise bad("refit_every_labels", "must be >= 1")
    if not config.refit_interval_seconds > 0:
        raise bad("refit_interval_seconds", "must be > 0")
    if not 0 < config.refit_cpu_share <= 1:
        raise bad("refit_cpu_share", "must be in (0, 1]")
    if not 1 <= config.default_lease_seconds <= 7 * 86400:
        raise bad("default_lease_seconds", "must be in [1, 604800]")
    if not 0 < config.selection_floor <= 1:
        raise bad("selection_floor", "must be in (0, 1]")
    if not 0 < config.default_confidence < 1:
        raise bad("default_confidence", "must be in (0, 1)")
    if config.max_batch_items < 1:
        raise bad("max_batch_items", "must be >= 1")
    if config.max_workers < 2:
        raise bad("max_workers", "must be >= 2")
    if config.shutdown_grace_seconds < 0:
        raise bad("shutdown_grace_seconds", "must be >= 0")
    if config.log_format not in ("text", "json"):
        raise bad("log_format", "must be 'text' or 'json'")
    if config.draw_seed < 0:
        raise bad("draw_seed", "must be >= 0 (0 = random seeds)")
    if not config.request_retention_hours > 0:
        raise bad("request_retention_hours", "must be > 0")
    if not 1 <= config.surrogate_threads <= 2:
        raise bad("surrogate_threads", "must be 1 or 2")


def split_host_port(address: str, *, name: str = "listen") -> tuple[str, int]:
    """Split ``HOST:PORT`` (``[::1]:PORT`` for IPv6); ValueError naming ``name`` if malformed."""
    host, sep, port_text = address.rpartition(":")
    if not sep or not host or not port_text.isdigit() or int(port_text) > 65535:
        raise ValueError(f"{name} = {address!r}: must be HOST:PORT with PORT in 0..65535.")
    return host.strip("[]"), int(port_text)


def is_loopback_host(host: str) -> bool:
    """True for ``localhost`` and loopback IP addresses (127.0.0.0/8, ::1)."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def _coerce(name: str, value: Any, target: Any) -> Any:
    """Convert a TOML / environment / flag value to the field's type."""
    if value is None:
        return None
    text_type = str(target)
    try:
        if "bool" in text_type:
            if isinstance(value, bool):
                return value
            lowered = str(value).strip().lower()
            if lowered in _TRUE:
                return True
            if lowered in _FALSE:
                return False
            raise ValueError
        if "Path" in text_type:
            return Path(str(value)).expanduser().absolute() if str(value) else None
        if "int" in text_type:
            if isinstance(value, bool):
                raise ValueError
            return int(value)
        if "float" in text_type:
            return float(value)
        return str(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} = {value!r}: expected {text_type}.") from None


def load_config(
    *,
    config_file: Path | None = None,
    environ: Mapping[str, str] | None = None,
    overrides: Mapping[str, Any] | None = None,
) -> ServerConfig:
    """Merge defaults, the TOML file, ``LEADLINE_*`` variables and ``overrides`` (flags).

    Unknown keys in the file raise ValueError naming them, so a typo never goes unnoticed.
    ``LEADLINE_*`` variables that are not settings are left alone (the client reads some,
    e.g. its token). ``overrides`` values of ``None`` are ignored. A value that breaks a
    rule is reported with where it came from (the variable, the flag or the file).
    """
    fields = {f.name: f for f in dataclasses.fields(ServerConfig)}
    merged: dict[str, Any] = {}
    sources: dict[str, str] = {}
    if config_file is not None:
        try:
            with open(config_file, "rb") as handle:
                document = tomllib.load(handle)
        except OSError as error:
            raise ValueError(f"config file {str(config_file)!r}: cannot read ({error}).") from None
        except tomllib.TOMLDecodeError as error:
            raise ValueError(
                f"config file {str(config_file)!r}: not valid TOML ({error})."
            ) from None
        # Settings may sit at the top level or under [server].
        table = document.get("server", document)
        for key, value in table.items():
            if key not in fields:
                raise ValueError(f"config file {str(config_file)!r}: unknown setting {key!r}.")
            merged[key] = _coerce(key, value, fields[key].type)
            sources[key] = f"config file {str(config_file)!r}"
    environ = os.environ if environ is None else environ
    for variable, value in environ.items():
        if not variable.startswith(_ENV_PREFIX):
            continue
        key = variable[len(_ENV_PREFIX) :].lower()
        if key not in fields:
            # Other LEADLINE_* variables belong to the client (e.g. LEADLINE_TOKEN).
            continue
        merged[key] = _coerce(variable, value, fields[key].type)
        sources[key] = f"environment variable {variable}"
    for key, value in (overrides or {}).items():
        if value is None:
            continue
        if key not in fields:
            raise ValueError(f"unknown setting {key!r}.")
        merged[key] = _coerce("--" + key.replace("_", "-"), value, fields[key].type)
        sources[key] = "flag --" + key.replace("_", "-")
    if merged.get("data_dir") is None:
        raise ValueError("data_dir: required (flag --data-dir or LEADLINE_DATA_DIR).")
    try:
        return ServerConfig(**merged)
    except ValueError as error:
        # The rule's message starts with the setting's name; say where its value came from.
        message = str(error)
        name = message.split(" ", 1)[0].rstrip(":")
        if name in sources:
            raise ValueError(f"{sources[name]}: {message}") from None
        raise
