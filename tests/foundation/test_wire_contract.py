"""The v1 wire contract carries every name the team's API agreement lists.

Checked against the compiled descriptors (what clients really see), not the .proto text.
The expected names are copied from shared/API.md, the wire contract agreed before the
first line of code; fields, methods and values may be added, never removed.
"""

from __future__ import annotations

import pytest
from google.protobuf import descriptor

from leadline.v1 import leadline_pb2

_FILE = leadline_pb2.DESCRIPTOR

# service -> methods (shared/API.md)
_SERVICES = {
    "PoolService": ["CreatePool", "GetPool", "ListPools", "DeletePool"],
    "IngestService": ["IngestItems", "AddValidationItems"],
    "LabelingService": ["AcquireItems", "SubmitLabels", "ReleaseItems"],
    "EstimateService": ["GetEstimate", "CheckGate"],
}

# message -> fields (shared/API.md)
_MESSAGES = {
    "Pool": [
        "name",
        "task",
        "num_classes",
        "feature_dim",
        "loss",
        "cost_matrix",
        "loss_cap",
        "default_mode",
        "item_count",
        "labeled_count",
        "validation_count",
    ],
    "CreatePoolRequest": ["pool_id", "pool"],
    "GetPoolRequest": ["name"],
    "ListPoolsRequest": ["page_size", "page_token"],
    "ListPoolsResponse": ["pools", "next_page_token"],
    "DeletePoolRequest": ["name"],
    "DeletePoolResponse": [],
    "ItemBatch": [
        "pool",
        "request_id",
        "item_ids",
        "features",
        "model_outputs",
        "payload_refs",
        "segments",
        "event_time_ms",
    ],
    "IngestSummary": ["accepted", "duplicates", "rejected", "errors"],
    # Validation items (shared/API.md, second wave).
    "ValidationBatch": [
        "pool",
        "item_ids",
        "features",
        "model_outputs",
        "class_labels",
        "values",
        "segments",
        "request_id",
    ],
    "ItemError": ["item_id", "reason"],
    "AcquireItemsRequest": ["pool", "count", "labeler", "lease_seconds", "request_id"],
    "Assignment": [
        "assignment_id",
        "item_id",
        "payload_ref",
        "selection_probability",
    ],
    "AcquireItemsResponse": ["assignments"],
    "LabelSubmission": ["assignment_id", "class_label", "value", "skip_reason"],
    "SubmitLabelsRequest": ["pool", "labels", "request_id"],
    "SubmitLabelsResponse": ["accepted", "errors"],
    "ReleaseItemsRequest": [],
    "ReleaseItemsResponse": [],
    "GetEstimateRequest": [
        "pool",
        "confidence",
        "mode",
        "segment",
        "start_time_ms",
        "end_time_ms",
    ],
    "Estimate": [
        "risk",
        "std_error",
        "lower",
        "upper",
        "anytime_lower",
        "anytime_upper",
        "bias_bound",
        "mode",
        "confidence",
        "items_in_scope",
        "labels_used",
        "labels_pending",
        "labels_skipped",
        "surrogate_version",
    ],
    "CheckGateRequest": [
        "pool",
        "max_risk",
        "confidence",
        "bound",
        "segment",
        "start_time_ms",
        "end_time_ms",
    ],
    "GateResult": ["verdict", "estimate", "more_labels_hint", "reason"],
}

# enum -> values (shared/API.md)
_ENUMS = {
    "TaskType": ["TASK_TYPE_UNSPECIFIED", "TASK_TYPE_CLASSIFICATION", "TASK_TYPE_REGRESSION"],
    "LossKind": [
        "LOSS_KIND_UNSPECIFIED",
        "LOSS_KIND_ZERO_ONE",
        "LOSS_KIND_CROSS_ENTROPY",
        "LOSS_KIND_BRIER",
        "LOSS_KIND_COST_MATRIX",
        "LOSS_KIND_SQUARED_ERROR",
        "LOSS_KIND_ABSOLUTE_ERROR",
    ],
    "EstimatorMode": [
        "ESTIMATOR_MODE_UNSPECIFIED",
        "ESTIMATOR_MODE_UNBIASED",
        "ESTIMATOR_MODE_SURROGATE",
        "ESTIMATOR_MODE_BALANCED",
    ],
    "BoundKind": ["BOUND_KIND_UNSPECIFIED", "BOUND_KIND_FIXED_TIME", "BOUND_KIND_ANYTIME"],
    "Verdict": ["VERDICT_UNSPECIFIED", "VERDICT_PASS", "VERDICT_FAIL", "VERDICT_UNDECIDED"],
}


def test_package_name() -> None:
    assert _FILE.package == "leadline.v1"


@pytest.mark.parametrize(("service", "methods"), sorted(_SERVICES.items()))
def test_service_has_every_method(service: str, methods: list[str]) -> None:
    found = _FILE.services_by_name[service]
    missing = [m for m in methods if m not in found.methods_by_name]
    assert not missing, f"{service} lacks {missing}"


@pytest.mark.parametrize(("message", "fields"), sorted(_MESSAGES.items()))
def test_message_has_every_field(message: str, fields: list[str]) -> None:
    found = _FILE.message_types_by_name[message]
    missing = [f for f in fields if f not in found.fields_by_name]
    assert not missing, f"{message} lacks {missing}"


@pytest.mark.parametrize(("enum", "values"), sorted(_ENUMS.items()))
def test_enum_has_every_value_and_zero_is_unspecified(enum: str, values: list[str]) -> None:
    found = _FILE.enum_types_by_name[enum]
    missing = [v for v in values if v not in found.values_by_name]
    assert not missing, f"{enum} lacks {missing}"
    assert found.values_by_number[0].name == f"{_upper_snake(enum)}_UNSPECIFIED"


def test_label_outcome_is_a_oneof() -> None:
    outcome = _FILE.message_types_by_name["LabelSubmission"].oneofs_by_name["outcome"]
    assert sorted(f.name for f in outcome.fields) == ["class_label", "skip_reason", "value"]


def test_selection_probability_is_a_double() -> None:
    field = _FILE.message_types_by_name["Assignment"].fields_by_name["selection_probability"]
    assert field.type == descriptor.FieldDescriptor.TYPE_DOUBLE


def test_rpc_types_match_the_agreement() -> None:
    pools = _FILE.services_by_name["PoolService"].methods_by_name
    assert pools["CreatePool"].output_type.name == "Pool"
    assert pools["GetPool"].input_type.name == "GetPoolRequest"
    ingest = _FILE.services_by_name["IngestService"].methods_by_name["IngestItems"]
    assert (ingest.input_type.name, ingest.output_type.name) == ("ItemBatch", "IngestSummary")
    validation = _FILE.services_by_name["IngestService"].methods_by_name["AddValidationItems"]
    assert (validation.input_type.name, validation.output_type.name) == (
        "ValidationBatch",
        "IngestSummary",
    )
    estimates = _FILE.services_by_name["EstimateService"].methods_by_name
    assert estimates["GetEstimate"].output_type.name == "Estimate"
    assert estimates["CheckGate"].output_type.name == "GateResult"


def test_validation_batch_field_numbers_and_types_match_the_agreement() -> None:
    # shared/API.md, "Validation items": exact numbers and types.
    fields = _FILE.message_types_by_name["ValidationBatch"].fields_by_name
    expected = {
        "pool": (1, descriptor.FieldDescriptor.TYPE_STRING, False),
        "item_ids": (2, descriptor.FieldDescriptor.TYPE_STRING, True),
        "features": (3, descriptor.FieldDescriptor.TYPE_FLOAT, True),
        "model_outputs": (4, descriptor.FieldDescriptor.TYPE_FLOAT, True),
        "class_labels": (5, descriptor.FieldDescriptor.TYPE_INT32, True),
        "values": (6, descriptor.FieldDescriptor.TYPE_DOUBLE, True),
        "segments": (7, descriptor.FieldDescriptor.TYPE_STRING, True),
        "request_id": (8, descriptor.FieldDescriptor.TYPE_STRING, False),
    }
    for name, (number, kind, repeated) in expected.items():
        field = fields[name]
        assert (field.number, field.type, field.is_repeated) == (number, kind, repeated), name
    count = _FILE.message_types_by_name["Pool"].fields_by_name["validation_count"]
    assert count.type == descriptor.FieldDescriptor.TYPE_INT64


def _upper_snake(name: str) -> str:
    out = []
    for i, ch in enumerate(name):
        if ch.isupper() and i:
            out.append("_")
        out.append(ch.upper())
    return "".join(out)
