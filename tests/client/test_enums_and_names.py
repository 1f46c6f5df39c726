"""Plain-English enum names and pool names."""

from __future__ import annotations

import grpc
import pytest

from leadline.client import InvalidRequest, pool_name
from leadline.client._enums import choices, enum_name, parse_enum
from leadline.v1 import leadline_pb2


@pytest.mark.parametrize(
    ("enum_type", "text", "expected"),
    [
        ("LossKind", "zero-one", leadline_pb2.LOSS_KIND_ZERO_ONE),
        ("LossKind", "ZERO_ONE", leadline_pb2.LOSS_KIND_ZERO_ONE),
        ("LossKind", "LOSS_KIND_CROSS_ENTROPY", leadline_pb2.LOSS_KIND_CROSS_ENTROPY),
        ("TaskType", "regression", leadline_pb2.TASK_TYPE_REGRESSION),
        ("EstimatorMode", "balanced", leadline_pb2.ESTIMATOR_MODE_BALANCED),
        ("BoundKind", "fixed-time", leadline_pb2.BOUND_KIND_FIXED_TIME),
        ("BoundKind", leadline_pb2.BOUND_KIND_ANYTIME, leadline_pb2.BOUND_KIND_ANYTIME),
        ("EstimatorMode", None, 0),
        ("EstimatorMode", "", 0),
    ],
)
def test_parse_enum_accepts_plain_names(enum_type: str, text: str, expected: int) -> None:
    assert parse_enum(enum_type, text) == expected


@pytest.mark.parametrize(
    ("enum_type", "value", "message"),
    [
        ("LossKind", "hinge", "loss = 'hinge' is not a known loss; expected one of: zero-one,"),
        ("TaskType", "unspecified", "task = 'unspecified' is not a known task"),
        ("BoundKind", 7, "bound = 7 is not a known bound"),
    ],
)
def test_parse_enum_refuses_unknown_names(enum_type: str, value: object, message: str) -> None:
    # A client-side refusal is an InvalidRequest, as the server's would be (README).
    with pytest.raises(InvalidRequest) as caught:
        parse_enum(enum_type, value)  # type: ignore[arg-type]
    assert caught.value.code is grpc.StatusCode.INVALID_ARGUMENT
    assert caught.value.details.startswith(message)


def test_choices_and_names_round_trip() -> None:
    for enum_type in ("TaskType", "LossKind", "EstimatorMode", "BoundKind", "Verdict"):
        for name in choices(enum_type):
            assert enum_name(enum_type, parse_enum(enum_type, name)) == name
    assert choices("BoundKind") == ["fixed-time", "anytime"]


@pytest.mark.parametrize(
    ("given", "expected"), [("fraud", "pools/fraud"), ("pools/fraud", "pools/fraud")]
)
def test_pool_name_accepts_id_or_name(given: str, expected: str) -> None:
    assert pool_name(given) == expected


@pytest.mark.parametrize("given", ["", "  ", "pools/"])
def test_pool_name_refuses_empty(given: str) -> None:
    with pytest.raises(InvalidRequest, match="must be a pool id or 'pools/"):
        pool_name(given)
