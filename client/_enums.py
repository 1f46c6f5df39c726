"""Plain-English names for the wire contract's enums, in both directions.

The CLI and the client accept ``"zero-one"``, ``"zero_one"`` or ``"ZERO_ONE"`` wherever
the proto has ``LOSS_KIND_ZERO_ONE``; the enum's integer value is accepted as well.
"""

from __future__ import annotations

from typing import Literal, overload

from leadline.client._errors import invalid_argument
from leadline.v1 import leadline_pb2

__all__ = ["enum_name", "parse_enum"]

# proto enum type -> (prefix of its value names, name used in messages)
_ENUMS = {
    "TaskType": ("TASK_TYPE_", "task"),
    "LossKind": ("LOSS_KIND_", "loss"),
    "EstimatorMode": ("ESTIMATOR_MODE_", "mode"),
    "BoundKind": ("BOUND_KIND_", "bound"),
    "Verdict": ("VERDICT_", "verdict"),
    "DrawStatus": ("DRAW_STATUS_", "draw status"),
}


def _descriptor(enum_type: str):  # type: ignore[no-untyped-def]
    return leadline_pb2.DESCRIPTOR.enum_types_by_name[enum_type]


def choices(enum_type: str) -> list[str]:
    """The accepted names of an enum, lower-case with hyphens, UNSPECIFIED left out."""
    prefix, _ = _ENUMS[enum_type]
    return [
        value.name.removeprefix(prefix).lower().replace("_", "-")
        for value in _descriptor(enum_type).values
        if not value.name.endswith("_UNSPECIFIED")
    ]


# One overload per enum: the number comes back typed as the generated message fields want it.
@overload
def parse_enum(
    enum_type: Literal["TaskType"], value: str | int | None, *, field: str = ""
) -> leadline_pb2.TaskType: ...
@overload
def parse_enum(
    enum_type: Literal["LossKind"], value: str | int | None, *, field: str = ""
) -> leadline_pb2.LossKind: ...
@overload
def parse_enum(
    enum_type: Literal["EstimatorMode"], value: str | int | None, *, field: str = ""
) -> leadline_pb2.EstimatorMode: ...
@overload
def parse_enum(
    enum_type: Literal["BoundKind"], value: str | int | None, *, field: str = ""
) -> leadline_pb2.BoundKind: ...
@overload
def parse_enum(
    enum_type: Literal["DrawStatus"], value: str | int | None, *, field: str = ""
) -> leadline_pb2.DrawStatus: ...
@overload
def parse_enum(enum_type: str, value: str | int | None, *, field: str = "") -> int: ...
def parse_enum(enum_type: str, value: str | int | None, *, field: str = "") -> int:
    """The enum number for ``value``; None and "" give 0 (UNSPECIFIED).

    Raises InvalidRequest naming the field, the value and the accepted names.
    """
    if value is None or value == "":
        return 0
    prefix, label = _ENUMS[enum_type]
    descriptor = _descriptor(enum_type)
    if isinstance(value, int) and not isinstance(value, bool):
        if value in descriptor.values_by_number:
            return value
    elif isinstance(value, str):
        key = value.strip().upper().replace("-", "_")
        full = key if key.startswith(prefix) else prefix + key
        if full in descriptor.values_by_name and not full.endswith("_UNSPECIFIED"):
            return int(descriptor.values_by_name[full].number)
    raise invalid_argument(
        f"{field or label} = {value!r} is not a known {label}; "
        f"expected one of: {', '.join(choices(enum_type))}."
    )


def enum_name(enum_type: str, number: int) -> str:
    """Lower-case hyphenated name of an enum number, e.g. 'zero-one'; 'unspecified' for 0."""
    prefix, _ = _ENUMS[enum_type]
    value = _descriptor(enum_type).values_by_number.get(number)
    if value is None:
        return f"unknown({number})"
    name: str = value.name
    return name.removeprefix(prefix).lower().replace("_", "-")
