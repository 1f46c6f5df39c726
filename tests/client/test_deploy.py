"""deploy/ files parse, agree with each other, and use only real `leadline serve` flags."""

from __future__ import annotations

import configparser
import json
import re
import shlex
import subprocess
import sys
import tomllib
from pathlib import Path
from typing import Any

import pytest
import yaml

from leadline.client import LocalServer

from .conftest import ROOT

DEPLOY = ROOT / "deploy"
_ROLES = {"admin", "ingest", "labeler", "reader"}


def _yaml(path: Path) -> list[dict[str, Any]]:
    return [doc for doc in yaml.safe_load_all(path.read_text()) if doc is not None]


def _manifests() -> dict[str, dict[str, Any]]:
    return {
        doc["kind"]: doc
        for path in sorted((DEPLOY / "kubernetes").glob("*.yaml"))
        for doc in _yaml(path)
    }


@pytest.fixture(scope="module")
def serve_flags() -> set[str]:
    """Every flag `leadline serve --help` documents (from the real server's parser)."""
    done = subprocess.run(
        [sys.executable, "-m", "leadline.client.cli", "serve", "--help"],
        capture_output=True,
        text=True,
        check=True,
        timeout=60,
    )
    flags = set(re.findall(r"(?<![\w-])(--[a-z][a-z0-9-]*)", done.stdout))
    assert {"--data-dir", "--listen", "--tokens", "--config"} <= flags
    return flags


def _dockerfile_instruction(name: str) -> list[str]:
    for line in (DEPLOY / "Dockerfile").read_text().splitlines():
        if line.startswith(f"{name} "):
            return json.loads(line[len(name) + 1 :])
    raise AssertionError(f"no {name} in deploy/Dockerfile")


def _systemd_unit() -> configparser.ConfigParser:
    unit = configparser.ConfigParser(interpolation=None, strict=True)
    unit.optionxform = str  # type: ignore[assignment,method-assign]  # keys are case-sensitive
    unit.read(DEPLOY / "systemd" / "leadline.service")
    return unit


def _serve_argvs() -> dict[str, list[str]]:
    """The server argv (after `leadline serve`) each deploy file runs."""
    compose = _yaml(DEPLOY / "compose.yaml")[0]["services"]["leadline"]
    container = _manifests()["Deployment"]["spec"]["template"]["spec"]["containers"][0]
    exec_start = shlex.split(_systemd_unit()["Service"]["ExecStart"])
    assert exec_start[1] == "serve"
    assert exec_start[0].endswith("/leadline")
    assert _dockerfile_instruction("ENTRYPOINT") == ["leadline", "serve"]
    return {
        "Dockerfile CMD": _dockerfile_instruction("CMD"),
        "compose.yaml": compose["command"],
        "kubernetes/deployment.yaml": container["args"],
        "systemd/leadline.service": exec_start[2:],
    }


@pytest.mark.parametrize("where", sorted(_serve_argvs()))
def test_every_flag_is_a_real_serve_flag(where: str, serve_flags: set[str]) -> None:
    used = {arg for arg in _serve_argvs()[where] if arg.startswith("--")}
    assert used, where
    assert used <= serve_flags, f"{where} uses unknown flags {sorted(used - serve_flags)}"
    assert {"--data-dir", "--listen", "--tokens"} <= used  # never --insecure-no-auth


def test_yaml_and_toml_files_parse() -> None:
    for path in [DEPLOY / "compose.yaml", *(DEPLOY / "kubernetes").glob("*.yaml")]:
        assert _yaml(path), path
    for path in (DEPLOY / "leadline.toml", DEPLOY / "tokens.example.toml"):
        assert tomllib.loads(path.read_text()), path
    assert set(_manifests()) == {
        "ConfigMap",
        "Deployment",
        "Kustomization",
        "PersistentVolumeClaim",
        "Secret",
        "Service",
    }


def test_kustomization_lists_every_manifest() -> None:
    listed = set(_manifests()["Kustomization"]["resources"])
    files = {p.name for p in (DEPLOY / "kubernetes").glob("*.yaml")} - {"kustomization.yaml"}
    assert listed == files


def _flag(argv: list[str], name: str) -> str:
    return argv[argv.index(name) + 1]


def test_kubernetes_pieces_fit_together() -> None:
    kinds = _manifests()
    pod = kinds["Deployment"]["spec"]["template"]["spec"]
    (container,) = pod["containers"]
    port = int(_flag(container["args"], "--listen").rsplit(":", 1)[1])
    assert container["ports"][0]["containerPort"] == port
    for probe in ("startupProbe", "readinessProbe", "livenessProbe"):
        assert container[probe]["grpc"]["port"] == port  # the standard gRPC health service
    service_port = kinds["Service"]["spec"]["ports"][0]
    assert service_port["targetPort"] == container["ports"][0]["name"]
    assert (
        kinds["Service"]["spec"]["selector"].items()
        <= pod.get("labels", kinds["Deployment"]["spec"]["template"]["metadata"]["labels"]).items()
    )
    # The SQLite data directory has one writer: never two pods on the volume.
    assert kinds["Deployment"]["spec"]["replicas"] == 1
    assert kinds["Deployment"]["spec"]["strategy"]["type"] == "Recreate"
    mounts = {m["name"]: m["mountPath"] for m in container["volumeMounts"]}
    volumes = {v["name"]: v for v in pod["volumes"]}
    assert mounts["data"] == _flag(container["args"], "--data-dir")
    assert (
        volumes["data"]["persistentVolumeClaim"]["claimName"]
        == (kinds["PersistentVolumeClaim"]["metadata"]["name"])
    )
    assert volumes["tokens"]["secret"]["secretName"] == kinds["Secret"]["metadata"]["name"]
    assert volumes["config"]["configMap"]["name"] == kinds["ConfigMap"]["metadata"]["name"]
    assert _flag(container["args"], "--tokens") == f"{mounts['tokens']}/tokens.toml"
    assert _flag(container["args"], "--config") == f"{mounts['config']}/leadline.toml"


def test_token_files_map_tokens_to_known_roles() -> None:
    secret = _manifests()["Secret"]["stringData"]["tokens.toml"]
    example = (DEPLOY / "tokens.example.toml").read_text()
    for text in (secret, example):
        tokens = tomllib.loads(text)["tokens"]
        assert tokens
        assert all(set(roles) <= _ROLES and roles for roles in tokens.values())
        assert {role for roles in tokens.values() for role in roles} == _ROLES
        assert all(token.startswith("replace-me-") for token in tokens)


def test_sample_config_is_accepted_by_the_server_loader(tmp_path: Path) -> None:
    # The server refuses unknown keys; conftest also starts every shared test server with
    # this file. Tests may import the service (only client code must not).
    from leadline.service.config import load_config

    config = load_config(
        config_file=DEPLOY / "leadline.toml", environ={}, overrides={"data_dir": tmp_path}
    )
    sample = tomllib.loads((DEPLOY / "leadline.toml").read_text())["server"]
    assert {key: getattr(config, key) for key in sample} == sample


def test_configmap_carries_the_sample_config_verbatim() -> None:
    configmap = _manifests()["ConfigMap"]["data"]["leadline.toml"]
    assert configmap == (DEPLOY / "leadline.toml").read_text()


def test_compose_and_dockerfile_agree_on_port_and_volume() -> None:
    compose = _yaml(DEPLOY / "compose.yaml")[0]
    service = compose["services"]["leadline"]
    port = _flag(service["command"], "--listen").rsplit(":", 1)[1]
    assert service["ports"] == [f"127.0.0.1:{port}:{port}"]
    assert f"EXPOSE {port}" in (DEPLOY / "Dockerfile").read_text()
    data_dir = _flag(service["command"], "--data-dir")
    assert f"leadline-data:{data_dir}" in service["volumes"]
    assert "leadline-data" in compose["volumes"]
    assert _flag(service["command"], "--tokens") == "/run/secrets/leadline_tokens"
    assert compose["secrets"]["leadline_tokens"]["file"] == "./tokens.toml"


def test_systemd_unit_stops_with_sigterm_and_restarts_on_failure() -> None:
    service = _systemd_unit()["Service"]
    assert service["KillSignal"] == "SIGTERM"
    assert service["Restart"] == "on-failure"
    assert _flag(shlex.split(service["ExecStart"]), "--data-dir") == "/var/lib/leadline"
    assert service["StateDirectory"] == "leadline"
    assert _systemd_unit()["Install"]["WantedBy"] == "multi-user.target"


def test_compose_health_check_command_works_against_a_real_server(server: LocalServer) -> None:
    check = _yaml(DEPLOY / "compose.yaml")[0]["services"]["leadline"]["healthcheck"]["test"]
    assert check[:3] == ["CMD", "python", "-c"]
    code = check[3].replace("127.0.0.1:50051", server.target)
    assert code != check[3]
    done = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, timeout=60, check=False
    )
    assert done.returncode == 0, done.stderr
