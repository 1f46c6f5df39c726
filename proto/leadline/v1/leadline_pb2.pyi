from google.protobuf.internal import containers as _containers
from google.protobuf.internal import enum_type_wrapper as _enum_type_wrapper
from google.protobuf import descriptor as _descriptor
from google.protobuf import message as _message
from collections.abc import Iterable as _Iterable, Mapping as _Mapping
from typing import ClassVar as _ClassVar, Optional as _Optional, Union as _Union

DESCRIPTOR: _descriptor.FileDescriptor

class TaskType(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    TASK_TYPE_UNSPECIFIED: _ClassVar[TaskType]
    TASK_TYPE_CLASSIFICATION: _ClassVar[TaskType]
    TASK_TYPE_REGRESSION: _ClassVar[TaskType]

class LossKind(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    LOSS_KIND_UNSPECIFIED: _ClassVar[LossKind]
    LOSS_KIND_ZERO_ONE: _ClassVar[LossKind]
    LOSS_KIND_CROSS_ENTROPY: _ClassVar[LossKind]
    LOSS_KIND_BRIER: _ClassVar[LossKind]
    LOSS_KIND_COST_MATRIX: _ClassVar[LossKind]
    LOSS_KIND_SQUARED_ERROR: _ClassVar[LossKind]
    LOSS_KIND_ABSOLUTE_ERROR: _ClassVar[LossKind]

class EstimatorMode(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    ESTIMATOR_MODE_UNSPECIFIED: _ClassVar[EstimatorMode]
    ESTIMATOR_MODE_UNBIASED: _ClassVar[EstimatorMode]
    ESTIMATOR_MODE_SURROGATE: _ClassVar[EstimatorMode]
    ESTIMATOR_MODE_BALANCED: _ClassVar[EstimatorMode]

class BoundKind(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    BOUND_KIND_UNSPECIFIED: _ClassVar[BoundKind]
    BOUND_KIND_FIXED_TIME: _ClassVar[BoundKind]
    BOUND_KIND_ANYTIME: _ClassVar[BoundKind]

class Verdict(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    VERDICT_UNSPECIFIED: _ClassVar[Verdict]
    VERDICT_PASS: _ClassVar[Verdict]
    VERDICT_FAIL: _ClassVar[Verdict]
    VERDICT_UNDECIDED: _ClassVar[Verdict]

class DrawStatus(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    DRAW_STATUS_UNSPECIFIED: _ClassVar[DrawStatus]
    DRAW_STATUS_ASSIGNED: _ClassVar[DrawStatus]
    DRAW_STATUS_LABELED: _ClassVar[DrawStatus]
    DRAW_STATUS_SKIPPED: _ClassVar[DrawStatus]
    DRAW_STATUS_WAITING: _ClassVar[DrawStatus]
TASK_TYPE_UNSPECIFIED: TaskType
TASK_TYPE_CLASSIFICATION: TaskType
TASK_TYPE_REGRESSION: TaskType
LOSS_KIND_UNSPECIFIED: LossKind
LOSS_KIND_ZERO_ONE: LossKind
LOSS_KIND_CROSS_ENTROPY: LossKind
LOSS_KIND_BRIER: LossKind
LOSS_KIND_COST_MATRIX: LossKind
LOSS_KIND_SQUARED_ERROR: LossKind
LOSS_KIND_ABSOLUTE_ERROR: LossKind
ESTIMATOR_MODE_UNSPECIFIED: EstimatorMode
ESTIMATOR_MODE_UNBIASED: EstimatorMode
ESTIMATOR_MODE_SURROGATE: EstimatorMode
ESTIMATOR_MODE_BALANCED: EstimatorMode
BOUND_KIND_UNSPECIFIED: BoundKind
BOUND_KIND_FIXED_TIME: BoundKind
BOUND_KIND_ANYTIME: BoundKind
VERDICT_UNSPECIFIED: Verdict
VERDICT_PASS: Verdict
VERDICT_FAIL: Verdict
VERDICT_UNDECIDED: Verdict
DRAW_STATUS_UNSPECIFIED: DrawStatus
DRAW_STATUS_ASSIGNED: DrawStatus
DRAW_STATUS_LABELED: DrawStatus
DRAW_STATUS_SKIPPED: DrawStatus
DRAW_STATUS_WAITING: DrawStatus

class Pool(_message.Message):
    __slots__ = ("name", "task", "num_classes", "feature_dim", "loss", "cost_matrix", "loss_cap", "default_mode", "item_count", "labeled_count", "create_time_ms", "description", "selection_floor", "default_lease_seconds", "default_confidence", "refit_every_labels", "surrogate_version", "draw_count", "pending_count", "skipped_count", "segments", "validation_count", "surrogate_label_count", "surrogate_validation_count")
    NAME_FIELD_NUMBER: _ClassVar[int]
    TASK_FIELD_NUMBER: _ClassVar[int]
    NUM_CLASSES_FIELD_NUMBER: _ClassVar[int]
    FEATURE_DIM_FIELD_NUMBER: _ClassVar[int]
    LOSS_FIELD_NUMBER: _ClassVar[int]
    COST_MATRIX_FIELD_NUMBER: _ClassVar[int]
    LOSS_CAP_FIELD_NUMBER: _ClassVar[int]
    DEFAULT_MODE_FIELD_NUMBER: _ClassVar[int]
    ITEM_COUNT_FIELD_NUMBER: _ClassVar[int]
    LABELED_COUNT_FIELD_NUMBER: _ClassVar[int]
    CREATE_TIME_MS_FIELD_NUMBER: _ClassVar[int]
    DESCRIPTION_FIELD_NUMBER: _ClassVar[int]
    SELECTION_FLOOR_FIELD_NUMBER: _ClassVar[int]
    DEFAULT_LEASE_SECONDS_FIELD_NUMBER: _ClassVar[int]
    DEFAULT_CONFIDENCE_FIELD_NUMBER: _ClassVar[int]
    REFIT_EVERY_LABELS_FIELD_NUMBER: _ClassVar[int]
    SURROGATE_VERSION_FIELD_NUMBER: _ClassVar[int]
    DRAW_COUNT_FIELD_NUMBER: _ClassVar[int]
    PENDING_COUNT_FIELD_NUMBER: _ClassVar[int]
    SKIPPED_COUNT_FIELD_NUMBER: _ClassVar[int]
    SEGMENTS_FIELD_NUMBER: _ClassVar[int]
    VALIDATION_COUNT_FIELD_NUMBER: _ClassVar[int]
    SURROGATE_LABEL_COUNT_FIELD_NUMBER: _ClassVar[int]
    SURROGATE_VALIDATION_COUNT_FIELD_NUMBER: _ClassVar[int]
    name: str
    task: TaskType
    num_classes: int
    feature_dim: int
    loss: LossKind
    cost_matrix: _containers.RepeatedScalarFieldContainer[float]
    loss_cap: float
    default_mode: EstimatorMode
    item_count: int
    labeled_count: int
    create_time_ms: int
    description: str
    selection_floor: float
    default_lease_seconds: int
    default_confidence: float
    refit_every_labels: int
    surrogate_version: int
    draw_count: int
    pending_count: int
    skipped_count: int
    segments: _containers.RepeatedScalarFieldContainer[str]
    validation_count: int
    surrogate_label_count: int
    surrogate_validation_count: int
    def __init__(self, name: _Optional[str] = ..., task: _Optional[_Union[TaskType, str]] = ..., num_classes: _Optional[int] = ..., feature_dim: _Optional[int] = ..., loss: _Optional[_Union[LossKind, str]] = ..., cost_matrix: _Optional[_Iterable[float]] = ..., loss_cap: _Optional[float] = ..., default_mode: _Optional[_Union[EstimatorMode, str]] = ..., item_count: _Optional[int] = ..., labeled_count: _Optional[int] = ..., create_time_ms: _Optional[int] = ..., description: _Optional[str] = ..., selection_floor: _Optional[float] = ..., default_lease_seconds: _Optional[int] = ..., default_confidence: _Optional[float] = ..., refit_every_labels: _Optional[int] = ..., surrogate_version: _Optional[int] = ..., draw_count: _Optional[int] = ..., pending_count: _Optional[int] = ..., skipped_count: _Optional[int] = ..., segments: _Optional[_Iterable[str]] = ..., validation_count: _Optional[int] = ..., surrogate_label_count: _Optional[int] = ..., surrogate_validation_count: _Optional[int] = ...) -> None: ...

class CreatePoolRequest(_message.Message):
    __slots__ = ("pool_id", "pool", "request_id")
    POOL_ID_FIELD_NUMBER: _ClassVar[int]
    POOL_FIELD_NUMBER: _ClassVar[int]
    REQUEST_ID_FIELD_NUMBER: _ClassVar[int]
    pool_id: str
    pool: Pool
    request_id: str
    def __init__(self, pool_id: _Optional[str] = ..., pool: _Optional[_Union[Pool, _Mapping]] = ..., request_id: _Optional[str] = ...) -> None: ...

class GetPoolRequest(_message.Message):
    __slots__ = ("name",)
    NAME_FIELD_NUMBER: _ClassVar[int]
    name: str
    def __init__(self, name: _Optional[str] = ...) -> None: ...

class ListPoolsRequest(_message.Message):
    __slots__ = ("page_size", "page_token")
    PAGE_SIZE_FIELD_NUMBER: _ClassVar[int]
    PAGE_TOKEN_FIELD_NUMBER: _ClassVar[int]
    page_size: int
    page_token: str
    def __init__(self, page_size: _Optional[int] = ..., page_token: _Optional[str] = ...) -> None: ...

class ListPoolsResponse(_message.Message):
    __slots__ = ("pools", "next_page_token")
    POOLS_FIELD_NUMBER: _ClassVar[int]
    NEXT_PAGE_TOKEN_FIELD_NUMBER: _ClassVar[int]
    pools: _containers.RepeatedCompositeFieldContainer[Pool]
    next_page_token: str
    def __init__(self, pools: _Optional[_Iterable[_Union[Pool, _Mapping]]] = ..., next_page_token: _Optional[str] = ...) -> None: ...

class DeletePoolRequest(_message.Message):
    __slots__ = ("name", "request_id")
    NAME_FIELD_NUMBER: _ClassVar[int]
    REQUEST_ID_FIELD_NUMBER: _ClassVar[int]
    name: str
    request_id: str
    def __init__(self, name: _Optional[str] = ..., request_id: _Optional[str] = ...) -> None: ...

class DeletePoolResponse(_message.Message):
    __slots__ = ()
    def __init__(self) -> None: ...

class ItemBatch(_message.Message):
    __slots__ = ("pool", "item_ids", "features", "model_outputs", "payload_refs", "segments", "event_time_ms", "request_id")
    POOL_FIELD_NUMBER: _ClassVar[int]
    ITEM_IDS_FIELD_NUMBER: _ClassVar[int]
    FEATURES_FIELD_NUMBER: _ClassVar[int]
    MODEL_OUTPUTS_FIELD_NUMBER: _ClassVar[int]
    PAYLOAD_REFS_FIELD_NUMBER: _ClassVar[int]
    SEGMENTS_FIELD_NUMBER: _ClassVar[int]
    EVENT_TIME_MS_FIELD_NUMBER: _ClassVar[int]
    REQUEST_ID_FIELD_NUMBER: _ClassVar[int]
    pool: str
    item_ids: _containers.RepeatedScalarFieldContainer[str]
    features: _containers.RepeatedScalarFieldContainer[float]
    model_outputs: _containers.RepeatedScalarFieldContainer[float]
    payload_refs: _containers.RepeatedScalarFieldContainer[str]
    segments: _containers.RepeatedScalarFieldContainer[str]
    event_time_ms: _containers.RepeatedScalarFieldContainer[int]
    request_id: str
    def __init__(self, pool: _Optional[str] = ..., item_ids: _Optional[_Iterable[str]] = ..., features: _Optional[_Iterable[float]] = ..., model_outputs: _Optional[_Iterable[float]] = ..., payload_refs: _Optional[_Iterable[str]] = ..., segments: _Optional[_Iterable[str]] = ..., event_time_ms: _Optional[_Iterable[int]] = ..., request_id: _Optional[str] = ...) -> None: ...

class ValidationBatch(_message.Message):
    __slots__ = ("pool", "item_ids", "features", "model_outputs", "class_labels", "values", "segments", "request_id")
    POOL_FIELD_NUMBER: _ClassVar[int]
    ITEM_IDS_FIELD_NUMBER: _ClassVar[int]
    FEATURES_FIELD_NUMBER: _ClassVar[int]
    MODEL_OUTPUTS_FIELD_NUMBER: _ClassVar[int]
    CLASS_LABELS_FIELD_NUMBER: _ClassVar[int]
    VALUES_FIELD_NUMBER: _ClassVar[int]
    SEGMENTS_FIELD_NUMBER: _ClassVar[int]
    REQUEST_ID_FIELD_NUMBER: _ClassVar[int]
    pool: str
    item_ids: _containers.RepeatedScalarFieldContainer[str]
    features: _containers.RepeatedScalarFieldContainer[float]
    model_outputs: _containers.RepeatedScalarFieldContainer[float]
    class_labels: _containers.RepeatedScalarFieldContainer[int]
    values: _containers.RepeatedScalarFieldContainer[float]
    segments: _containers.RepeatedScalarFieldContainer[str]
    request_id: str
    def __init__(self, pool: _Optional[str] = ..., item_ids: _Optional[_Iterable[str]] = ..., features: _Optional[_Iterable[float]] = ..., model_outputs: _Optional[_Iterable[float]] = ..., class_labels: _Optional[_Iterable[int]] = ..., values: _Optional[_Iterable[float]] = ..., segments: _Optional[_Iterable[str]] = ..., request_id: _Optional[str] = ...) -> None: ...

class ItemError(_message.Message):
    __slots__ = ("item_id", "reason", "field")
    ITEM_ID_FIELD_NUMBER: _ClassVar[int]
    REASON_FIELD_NUMBER: _ClassVar[int]
    FIELD_FIELD_NUMBER: _ClassVar[int]
    item_id: str
    reason: str
    field: str
    def __init__(self, item_id: _Optional[str] = ..., reason: _Optional[str] = ..., field: _Optional[str] = ...) -> None: ...

class IngestSummary(_message.Message):
    __slots__ = ("accepted", "duplicates", "rejected", "errors", "item_count", "errors_truncated")
    ACCEPTED_FIELD_NUMBER: _ClassVar[int]
    DUPLICATES_FIELD_NUMBER: _ClassVar[int]
    REJECTED_FIELD_NUMBER: _ClassVar[int]
    ERRORS_FIELD_NUMBER: _ClassVar[int]
    ITEM_COUNT_FIELD_NUMBER: _ClassVar[int]
    ERRORS_TRUNCATED_FIELD_NUMBER: _ClassVar[int]
    accepted: int
    duplicates: int
    rejected: int
    errors: _containers.RepeatedCompositeFieldContainer[ItemError]
    item_count: int
    errors_truncated: bool
    def __init__(self, accepted: _Optional[int] = ..., duplicates: _Optional[int] = ..., rejected: _Optional[int] = ..., errors: _Optional[_Iterable[_Union[ItemError, _Mapping]]] = ..., item_count: _Optional[int] = ..., errors_truncated: _Optional[bool] = ...) -> None: ...

class AcquireItemsRequest(_message.Message):
    __slots__ = ("pool", "count", "labeler", "lease_seconds", "request_id")
    POOL_FIELD_NUMBER: _ClassVar[int]
    COUNT_FIELD_NUMBER: _ClassVar[int]
    LABELER_FIELD_NUMBER: _ClassVar[int]
    LEASE_SECONDS_FIELD_NUMBER: _ClassVar[int]
    REQUEST_ID_FIELD_NUMBER: _ClassVar[int]
    pool: str
    count: int
    labeler: str
    lease_seconds: int
    request_id: str
    def __init__(self, pool: _Optional[str] = ..., count: _Optional[int] = ..., labeler: _Optional[str] = ..., lease_seconds: _Optional[int] = ..., request_id: _Optional[str] = ...) -> None: ...

class Assignment(_message.Message):
    __slots__ = ("assignment_id", "item_id", "payload_ref", "lease_expire_time_ms", "selection_probability", "draw_index", "segment")
    ASSIGNMENT_ID_FIELD_NUMBER: _ClassVar[int]
    ITEM_ID_FIELD_NUMBER: _ClassVar[int]
    PAYLOAD_REF_FIELD_NUMBER: _ClassVar[int]
    LEASE_EXPIRE_TIME_MS_FIELD_NUMBER: _ClassVar[int]
    SELECTION_PROBABILITY_FIELD_NUMBER: _ClassVar[int]
    DRAW_INDEX_FIELD_NUMBER: _ClassVar[int]
    SEGMENT_FIELD_NUMBER: _ClassVar[int]
    assignment_id: str
    item_id: str
    payload_ref: str
    lease_expire_time_ms: int
    selection_probability: float
    draw_index: int
    segment: str
    def __init__(self, assignment_id: _Optional[str] = ..., item_id: _Optional[str] = ..., payload_ref: _Optional[str] = ..., lease_expire_time_ms: _Optional[int] = ..., selection_probability: _Optional[float] = ..., draw_index: _Optional[int] = ..., segment: _Optional[str] = ...) -> None: ...

class AcquireItemsResponse(_message.Message):
    __slots__ = ("assignments",)
    ASSIGNMENTS_FIELD_NUMBER: _ClassVar[int]
    assignments: _containers.RepeatedCompositeFieldContainer[Assignment]
    def __init__(self, assignments: _Optional[_Iterable[_Union[Assignment, _Mapping]]] = ...) -> None: ...

class LabelSubmission(_message.Message):
    __slots__ = ("assignment_id", "class_label", "value", "skip_reason")
    ASSIGNMENT_ID_FIELD_NUMBER: _ClassVar[int]
    CLASS_LABEL_FIELD_NUMBER: _ClassVar[int]
    VALUE_FIELD_NUMBER: _ClassVar[int]
    SKIP_REASON_FIELD_NUMBER: _ClassVar[int]
    assignment_id: str
    class_label: int
    value: float
    skip_reason: str
    def __init__(self, assignment_id: _Optional[str] = ..., class_label: _Optional[int] = ..., value: _Optional[float] = ..., skip_reason: _Optional[str] = ...) -> None: ...

class SubmitLabelsRequest(_message.Message):
    __slots__ = ("pool", "labels", "request_id", "labeler")
    POOL_FIELD_NUMBER: _ClassVar[int]
    LABELS_FIELD_NUMBER: _ClassVar[int]
    REQUEST_ID_FIELD_NUMBER: _ClassVar[int]
    LABELER_FIELD_NUMBER: _ClassVar[int]
    pool: str
    labels: _containers.RepeatedCompositeFieldContainer[LabelSubmission]
    request_id: str
    labeler: str
    def __init__(self, pool: _Optional[str] = ..., labels: _Optional[_Iterable[_Union[LabelSubmission, _Mapping]]] = ..., request_id: _Optional[str] = ..., labeler: _Optional[str] = ...) -> None: ...

class SubmitLabelsResponse(_message.Message):
    __slots__ = ("accepted", "errors", "rejected", "errors_truncated")
    ACCEPTED_FIELD_NUMBER: _ClassVar[int]
    ERRORS_FIELD_NUMBER: _ClassVar[int]
    REJECTED_FIELD_NUMBER: _ClassVar[int]
    ERRORS_TRUNCATED_FIELD_NUMBER: _ClassVar[int]
    accepted: int
    errors: _containers.RepeatedCompositeFieldContainer[ItemError]
    rejected: int
    errors_truncated: bool
    def __init__(self, accepted: _Optional[int] = ..., errors: _Optional[_Iterable[_Union[ItemError, _Mapping]]] = ..., rejected: _Optional[int] = ..., errors_truncated: _Optional[bool] = ...) -> None: ...

class ReleaseItemsRequest(_message.Message):
    __slots__ = ("pool", "assignment_ids", "labeler", "request_id")
    POOL_FIELD_NUMBER: _ClassVar[int]
    ASSIGNMENT_IDS_FIELD_NUMBER: _ClassVar[int]
    LABELER_FIELD_NUMBER: _ClassVar[int]
    REQUEST_ID_FIELD_NUMBER: _ClassVar[int]
    pool: str
    assignment_ids: _containers.RepeatedScalarFieldContainer[str]
    labeler: str
    request_id: str
    def __init__(self, pool: _Optional[str] = ..., assignment_ids: _Optional[_Iterable[str]] = ..., labeler: _Optional[str] = ..., request_id: _Optional[str] = ...) -> None: ...

class ReleaseItemsResponse(_message.Message):
    __slots__ = ("released", "errors", "rejected", "errors_truncated")
    RELEASED_FIELD_NUMBER: _ClassVar[int]
    ERRORS_FIELD_NUMBER: _ClassVar[int]
    REJECTED_FIELD_NUMBER: _ClassVar[int]
    ERRORS_TRUNCATED_FIELD_NUMBER: _ClassVar[int]
    released: int
    errors: _containers.RepeatedCompositeFieldContainer[ItemError]
    rejected: int
    errors_truncated: bool
    def __init__(self, released: _Optional[int] = ..., errors: _Optional[_Iterable[_Union[ItemError, _Mapping]]] = ..., rejected: _Optional[int] = ..., errors_truncated: _Optional[bool] = ...) -> None: ...

class GetEstimateRequest(_message.Message):
    __slots__ = ("pool", "confidence", "mode", "segment", "start_time_ms", "end_time_ms")
    POOL_FIELD_NUMBER: _ClassVar[int]
    CONFIDENCE_FIELD_NUMBER: _ClassVar[int]
    MODE_FIELD_NUMBER: _ClassVar[int]
    SEGMENT_FIELD_NUMBER: _ClassVar[int]
    START_TIME_MS_FIELD_NUMBER: _ClassVar[int]
    END_TIME_MS_FIELD_NUMBER: _ClassVar[int]
    pool: str
    confidence: float
    mode: EstimatorMode
    segment: str
    start_time_ms: int
    end_time_ms: int
    def __init__(self, pool: _Optional[str] = ..., confidence: _Optional[float] = ..., mode: _Optional[_Union[EstimatorMode, str]] = ..., segment: _Optional[str] = ..., start_time_ms: _Optional[int] = ..., end_time_ms: _Optional[int] = ...) -> None: ...

class Estimate(_message.Message):
    __slots__ = ("risk", "std_error", "lower", "upper", "anytime_lower", "anytime_upper", "bias_bound", "mode", "confidence", "items_in_scope", "labels_used", "labels_pending", "labels_skipped", "surrogate_version", "nonresponse_allowance", "items_unreached", "unbiased_weight", "loss_bound")
    RISK_FIELD_NUMBER: _ClassVar[int]
    STD_ERROR_FIELD_NUMBER: _ClassVar[int]
    LOWER_FIELD_NUMBER: _ClassVar[int]
    UPPER_FIELD_NUMBER: _ClassVar[int]
    ANYTIME_LOWER_FIELD_NUMBER: _ClassVar[int]
    ANYTIME_UPPER_FIELD_NUMBER: _ClassVar[int]
    BIAS_BOUND_FIELD_NUMBER: _ClassVar[int]
    MODE_FIELD_NUMBER: _ClassVar[int]
    CONFIDENCE_FIELD_NUMBER: _ClassVar[int]
    ITEMS_IN_SCOPE_FIELD_NUMBER: _ClassVar[int]
    LABELS_USED_FIELD_NUMBER: _ClassVar[int]
    LABELS_PENDING_FIELD_NUMBER: _ClassVar[int]
    LABELS_SKIPPED_FIELD_NUMBER: _ClassVar[int]
    SURROGATE_VERSION_FIELD_NUMBER: _ClassVar[int]
    NONRESPONSE_ALLOWANCE_FIELD_NUMBER: _ClassVar[int]
    ITEMS_UNREACHED_FIELD_NUMBER: _ClassVar[int]
    UNBIASED_WEIGHT_FIELD_NUMBER: _ClassVar[int]
    LOSS_BOUND_FIELD_NUMBER: _ClassVar[int]
    risk: float
    std_error: float
    lower: float
    upper: float
    anytime_lower: float
    anytime_upper: float
    bias_bound: float
    mode: EstimatorMode
    confidence: float
    items_in_scope: int
    labels_used: int
    labels_pending: int
    labels_skipped: int
    surrogate_version: int
    nonresponse_allowance: float
    items_unreached: int
    unbiased_weight: float
    loss_bound: float
    def __init__(self, risk: _Optional[float] = ..., std_error: _Optional[float] = ..., lower: _Optional[float] = ..., upper: _Optional[float] = ..., anytime_lower: _Optional[float] = ..., anytime_upper: _Optional[float] = ..., bias_bound: _Optional[float] = ..., mode: _Optional[_Union[EstimatorMode, str]] = ..., confidence: _Optional[float] = ..., items_in_scope: _Optional[int] = ..., labels_used: _Optional[int] = ..., labels_pending: _Optional[int] = ..., labels_skipped: _Optional[int] = ..., surrogate_version: _Optional[int] = ..., nonresponse_allowance: _Optional[float] = ..., items_unreached: _Optional[int] = ..., unbiased_weight: _Optional[float] = ..., loss_bound: _Optional[float] = ...) -> None: ...

class CheckGateRequest(_message.Message):
    __slots__ = ("pool", "max_risk", "confidence", "bound", "segment", "start_time_ms", "end_time_ms", "mode")
    POOL_FIELD_NUMBER: _ClassVar[int]
    MAX_RISK_FIELD_NUMBER: _ClassVar[int]
    CONFIDENCE_FIELD_NUMBER: _ClassVar[int]
    BOUND_FIELD_NUMBER: _ClassVar[int]
    SEGMENT_FIELD_NUMBER: _ClassVar[int]
    START_TIME_MS_FIELD_NUMBER: _ClassVar[int]
    END_TIME_MS_FIELD_NUMBER: _ClassVar[int]
    MODE_FIELD_NUMBER: _ClassVar[int]
    pool: str
    max_risk: float
    confidence: float
    bound: BoundKind
    segment: str
    start_time_ms: int
    end_time_ms: int
    mode: EstimatorMode
    def __init__(self, pool: _Optional[str] = ..., max_risk: _Optional[float] = ..., confidence: _Optional[float] = ..., bound: _Optional[_Union[BoundKind, str]] = ..., segment: _Optional[str] = ..., start_time_ms: _Optional[int] = ..., end_time_ms: _Optional[int] = ..., mode: _Optional[_Union[EstimatorMode, str]] = ...) -> None: ...

class GateResult(_message.Message):
    __slots__ = ("verdict", "estimate", "more_labels_hint", "reason", "bound")
    VERDICT_FIELD_NUMBER: _ClassVar[int]
    ESTIMATE_FIELD_NUMBER: _ClassVar[int]
    MORE_LABELS_HINT_FIELD_NUMBER: _ClassVar[int]
    REASON_FIELD_NUMBER: _ClassVar[int]
    BOUND_FIELD_NUMBER: _ClassVar[int]
    verdict: Verdict
    estimate: Estimate
    more_labels_hint: int
    reason: str
    bound: BoundKind
    def __init__(self, verdict: _Optional[_Union[Verdict, str]] = ..., estimate: _Optional[_Union[Estimate, _Mapping]] = ..., more_labels_hint: _Optional[int] = ..., reason: _Optional[str] = ..., bound: _Optional[_Union[BoundKind, str]] = ...) -> None: ...

class ListDrawsRequest(_message.Message):
    __slots__ = ("pool", "page_size", "page_token")
    POOL_FIELD_NUMBER: _ClassVar[int]
    PAGE_SIZE_FIELD_NUMBER: _ClassVar[int]
    PAGE_TOKEN_FIELD_NUMBER: _ClassVar[int]
    pool: str
    page_size: int
    page_token: str
    def __init__(self, pool: _Optional[str] = ..., page_size: _Optional[int] = ..., page_token: _Optional[str] = ...) -> None: ...

class Draw(_message.Message):
    __slots__ = ("draw_index", "item_id", "selection_probability", "surrogate_version", "expected_loss", "status", "class_label", "value", "loss", "labeler", "draw_time_ms", "label_time_ms", "skip_reason", "segment", "remaining_count")
    DRAW_INDEX_FIELD_NUMBER: _ClassVar[int]
    ITEM_ID_FIELD_NUMBER: _ClassVar[int]
    SELECTION_PROBABILITY_FIELD_NUMBER: _ClassVar[int]
    SURROGATE_VERSION_FIELD_NUMBER: _ClassVar[int]
    EXPECTED_LOSS_FIELD_NUMBER: _ClassVar[int]
    STATUS_FIELD_NUMBER: _ClassVar[int]
    CLASS_LABEL_FIELD_NUMBER: _ClassVar[int]
    VALUE_FIELD_NUMBER: _ClassVar[int]
    LOSS_FIELD_NUMBER: _ClassVar[int]
    LABELER_FIELD_NUMBER: _ClassVar[int]
    DRAW_TIME_MS_FIELD_NUMBER: _ClassVar[int]
    LABEL_TIME_MS_FIELD_NUMBER: _ClassVar[int]
    SKIP_REASON_FIELD_NUMBER: _ClassVar[int]
    SEGMENT_FIELD_NUMBER: _ClassVar[int]
    REMAINING_COUNT_FIELD_NUMBER: _ClassVar[int]
    draw_index: int
    item_id: str
    selection_probability: float
    surrogate_version: int
    expected_loss: float
    status: DrawStatus
    class_label: int
    value: float
    loss: float
    labeler: str
    draw_time_ms: int
    label_time_ms: int
    skip_reason: str
    segment: str
    remaining_count: int
    def __init__(self, draw_index: _Optional[int] = ..., item_id: _Optional[str] = ..., selection_probability: _Optional[float] = ..., surrogate_version: _Optional[int] = ..., expected_loss: _Optional[float] = ..., status: _Optional[_Union[DrawStatus, str]] = ..., class_label: _Optional[int] = ..., value: _Optional[float] = ..., loss: _Optional[float] = ..., labeler: _Optional[str] = ..., draw_time_ms: _Optional[int] = ..., label_time_ms: _Optional[int] = ..., skip_reason: _Optional[str] = ..., segment: _Optional[str] = ..., remaining_count: _Optional[int] = ...) -> None: ...

class ListDrawsResponse(_message.Message):
    __slots__ = ("draws", "next_page_token")
    DRAWS_FIELD_NUMBER: _ClassVar[int]
    NEXT_PAGE_TOKEN_FIELD_NUMBER: _ClassVar[int]
    draws: _containers.RepeatedCompositeFieldContainer[Draw]
    next_page_token: str
    def __init__(self, draws: _Optional[_Iterable[_Union[Draw, _Mapping]]] = ..., next_page_token: _Optional[str] = ...) -> None: ...

class GetEstimateTraceRequest(_message.Message):
    __slots__ = ("pool", "confidence", "mode", "max_points", "segment")
    POOL_FIELD_NUMBER: _ClassVar[int]
    CONFIDENCE_FIELD_NUMBER: _ClassVar[int]
    MODE_FIELD_NUMBER: _ClassVar[int]
    MAX_POINTS_FIELD_NUMBER: _ClassVar[int]
    SEGMENT_FIELD_NUMBER: _ClassVar[int]
    pool: str
    confidence: float
    mode: EstimatorMode
    max_points: int
    segment: str
    def __init__(self, pool: _Optional[str] = ..., confidence: _Optional[float] = ..., mode: _Optional[_Union[EstimatorMode, str]] = ..., max_points: _Optional[int] = ..., segment: _Optional[str] = ...) -> None: ...

class EstimateTrace(_message.Message):
    __slots__ = ("points",)
    POINTS_FIELD_NUMBER: _ClassVar[int]
    points: _containers.RepeatedCompositeFieldContainer[Estimate]
    def __init__(self, points: _Optional[_Iterable[_Union[Estimate, _Mapping]]] = ...) -> None: ...
