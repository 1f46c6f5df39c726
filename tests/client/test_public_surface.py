"""The client's public surface is pinned: adding or removing a name is a deliberate act."""

from __future__ import annotations

import subprocess
import sys

import grpc
import pytest

import leadline.client as client_package
from leadline.client import (
    AccessDenied,
    AlreadyExists,
    Conflict,
    DeadlineExceeded,
    InvalidRequest,
    LeadlineError,
    NotFound,
    Overloaded,
    Unavailable,
)
from tests.surface import public_names

_PUBLIC = {
    "AccessDenied",
    "AlreadyExists",
    "BoundKind",
    "Client",
    "Conflict",
    "DeadlineExceeded",
    "Estimate",
    "EstimatorMode",
    "GateResult",
    "IngestResult",
    "InvalidRequest",
    "LeadlineError",
    "LocalServer",
    "NotFound",
    "Overloaded",
    "PartiallyAccepted",
    "Skip",
    "TlsConfig",
    "Unavailable",
    "Verdict",
    "pool_name",
}

_CLIENT_METHODS = {
    "acquire",
    "add_validation",
    "check_gate",
    "close",
    "create_pool",
    "delete_pool",
    "get_estimate",
    "get_estimate_trace",
    "get_pool",
    "health",
    "ingest",
    "iter_draws",
    "iter_pools",
    "list_draws",
    "list_pools",
    "release",
    "submit_labels",
}


def test_all_is_every_public_name_in_order() -> None:
    assert client_package.__all__ == public_names(client_package)


def test_all_lists_exactly_the_public_names() -> None:
    assert set(client_package.__all__) == _PUBLIC
    for name in _PUBLIC:
        assert getattr(client_package, name) is not None


def test_client_has_a_method_per_rpc_and_nothing_else_public() -> None:
    public = {name for name in dir(client_package.Client) if not name.startswith("_")}
    assert public == _CLIENT_METHODS


def test_every_rpc_of_the_contract_has_a_client_method() -> None:
    from leadline.v1 import leadline_pb2

    rpc_to_method = {
        "CreatePool": "create_pool",
        "GetPool": "get_pool",
        "ListPools": "list_pools",
        "DeletePool": "delete_pool",
        "IngestItems": "ingest",
        "AddValidationItems": "add_validation",
        "AcquireItems": "acquire",
        "SubmitLabels": "submit_labels",
        "ReleaseItems": "release",
        "GetEstimate": "get_estimate",
        "CheckGate": "check_gate",
        "ListDraws": "list_draws",
        "GetEstimateTrace": "get_estimate_trace",
    }
    rpcs = {
        method.name
        for service in leadline_pb2.DESCRIPTOR.services_by_name.values()
        for method in service.methods
    }
    assert rpcs == set(rpc_to_method)
    assert set(rpc_to_method.values()) <= _CLIENT_METHODS


@pytest.mark.parametrize(
    "cls",
    [
        InvalidRequest,
        NotFound,
        AlreadyExists,
        AccessDenied,
        Conflict,
        Overloaded,
        Unavailable,
        DeadlineExceeded,
    ],
)
def test_every_exception_is_a_leadline_error_with_a_docstring(cls: type) -> None:
    assert issubclass(cls, LeadlineError)
    assert cls.__doc__
    assert cls.__doc__.strip()


def test_error_string_names_code_and_method() -> None:
    error = NotFound("pool 'pools/x' not found", code=grpc.StatusCode.NOT_FOUND, method="GetPool")
    assert str(error) == "NOT_FOUND in GetPool: pool 'pools/x' not found"
    assert error.code is grpc.StatusCode.NOT_FOUND
    assert error.details == "pool 'pools/x' not found"


def test_client_modules_never_import_the_service() -> None:
    # Architecture rule: only `leadline serve` reaches into leadline.service, lazily.
    code = (
        "import sys\n"
        "import leadline.client, leadline.client.cli, leadline.client.report\n"
        "import leadline.client.export, leadline.client.demo\n"
        "print(sorted(m for m in sys.modules if m.startswith('leadline.service')))\n"
    )
    done = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=60
    )
    assert done.stdout.strip() == "[]"
