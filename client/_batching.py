"""Split numpy ingest arrays into ItemBatch messages of a safe size.

gRPC refuses messages above 4 MiB by default, and one huge message also holds the
server's single writer for long. We cut the rows so that each message stays under a byte
budget (1 MiB by default) and a row cap, in order, without copying more than needed.
"""

from __future__ import annotations

import uuid
from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np
from google.protobuf.message import Message

from leadline.client._errors import invalid_argument
from leadline.v1 import leadline_pb2

__all__ = [
    "IngestColumns",
    "ValidationColumns",
    "build_batches",
    "build_validation_batches",
    "plan_batches",
]

# Bytes a protobuf field adds around its payload: tag plus a length varint. Generous on
# purpose: the budget must hold, a few bytes of slack cost nothing.
_FIELD_OVERHEAD = 6
# A message's fixed part: pool name, request id, tags of the packed fields.
_MESSAGE_OVERHEAD = 512
# A fixed namespace so that a caller's request_id always expands to the same batch ids.
_BATCH_ID_NAMESPACE = uuid.UUID("6f0b3c52-93f1-4a47-8d8a-4c8e5b7f2d19")


@dataclass(frozen=True)
class IngestColumns:
    """Validated ingest columns, row-aligned; optional columns are None or length n."""

    item_ids: list[str]
    features: np.ndarray  # (n, d) float32
    outputs: np.ndarray  # (n, k) or (n,) float32
    payload_refs: list[str] | None
    segments: list[str] | None
    event_time_ms: np.ndarray | None  # (n,) int64

    @classmethod
    def from_arrays(
        cls,
        item_ids: Sequence[str] | np.ndarray,
        features: np.ndarray | Sequence[Sequence[float]],
        outputs: np.ndarray | Sequence[float] | Sequence[Sequence[float]],
        *,
        payload_refs: Sequence[str] | np.ndarray | None = None,
        segments: Sequence[str] | np.ndarray | None = None,
        event_time_ms: Sequence[int] | np.ndarray | None = None,
    ) -> IngestColumns:
        """Check shapes and lengths; InvalidRequest names the argument, its shape and the rule.

        Values (finite numbers, probabilities summing to 1, id rules) are the server's to
        check: it does so once for every client.
        """
        ids = [str(item_id) for item_id in item_ids]
        n = len(ids)
        feats = np.asarray(features, dtype=np.float32)
        if feats.ndim != 2 or feats.shape[0] != n:
            raise invalid_argument(
                f"features has shape {feats.shape}: must be (n, feature_dim) with n == "
                f"len(item_ids) == {n}."
            )
        outs = np.asarray(outputs, dtype=np.float32)
        if outs.ndim not in (1, 2) or outs.shape[0] != n:
            raise invalid_argument(
                f"outputs has shape {outs.shape}: must be (n, num_classes) for "
                f"classification or (n,) for regression, with n == len(item_ids) == {n}."
            )
        refs = cls._optional_strings("payload_refs", payload_refs, n)
        segs = cls._optional_strings("segments", segments, n)
        times = None
        if event_time_ms is not None:
            times = np.asarray(event_time_ms, dtype=np.int64)
            if times.shape != (n,):
                raise invalid_argument(
                    f"event_time_ms has shape {times.shape}: must be ({n},): one per item."
                )
        return cls(ids, feats, outs, refs, segs, times)

    @staticmethod
    def _optional_strings(
        name: str, values: Sequence[str] | np.ndarray | None, n: int
    ) -> list[str] | None:
        if values is None:
            return None
        strings = [str(value) for value in values]
        if len(strings) != n:
            raise invalid_argument(
                f"{name} has {len(strings)} entries: must have {n}: one per item."
            )
        return strings

    def __len__(self) -> int:
        return len(self.item_ids)

    def row_bytes(self) -> np.ndarray:
        """Upper estimate of the encoded bytes each row adds to a message."""
        n = len(self)
        fixed = 4 * (
            self.features.shape[1] + (self.outputs.shape[1] if self.outputs.ndim == 2 else 1)
        )
        sizes = np.full(n, fixed, dtype=np.int64)
        for strings in (self.item_ids, self.payload_refs, self.segments):
            if strings is not None:
                sizes += np.fromiter(
                    (len(s.encode("utf-8")) + _FIELD_OVERHEAD for s in strings),
                    dtype=np.int64,
                    count=n,
                )
        if self.event_time_ms is not None:
            sizes += 10  # at most a 10-byte varint each
        return sizes


@dataclass(frozen=True)
class ValidationColumns:
    """Validation rows: ids, features, held-out outputs and optional segments (``rows``),
    plus one label per row (int64 class labels or float64 target values)."""

    rows: IngestColumns
    labels: np.ndarray
    classification: bool

    @classmethod
    def from_arrays(
        cls,
        item_ids: Sequence[str] | np.ndarray,
        features: np.ndarray | Sequence[Sequence[float]],
        outputs: np.ndarray | Sequence[float] | Sequence[Sequence[float]],
        labels: np.ndarray | Sequence[int] | Sequence[float],
        *,
        classification: bool,
        segments: Sequence[str] | np.ndarray | None = None,
    ) -> ValidationColumns:
        """Check shapes; classification labels must be whole numbers (sent as class_labels),
        regression labels are sent as values. InvalidRequest names the argument and the rule."""
        rows = IngestColumns.from_arrays(item_ids, features, outputs, segments=segments)
        n = len(rows)
        values = np.asarray(labels)
        if values.shape != (n,):
            raise invalid_argument(
                f"labels has shape {values.shape}: must be ({n},): one per item."
            )
        if values.dtype.kind not in "iuf":
            raise invalid_argument(f"labels has dtype {values.dtype}: must be numeric.")
        if classification:
            whole = np.isfinite(values) & (values == np.round(values))
            if not whole.all():
                row = int(np.flatnonzero(~whole)[0])
                raise invalid_argument(
                    f"labels[{row}] = {values[row].item()!r}: a classification pool takes class "
                    "indices (whole numbers)."
                )
            return cls(rows, values.astype(np.int64), True)
        return cls(rows, values.astype(np.float64), False)

    def __len__(self) -> int:
        return len(self.rows)

    def row_bytes(self) -> np.ndarray:
        # A label is at most a 10-byte varint (negative int32) or an 8-byte double.
        return self.rows.row_bytes() + 10


def plan_batches(row_bytes: np.ndarray, *, max_rows: int, max_bytes: int) -> list[slice]:
    """Consecutive row ranges, each with at most max_rows rows and max_bytes bytes.

    A single row larger than the budget gets a batch of its own (the server then decides).
    """
    if max_rows < 1:
        raise invalid_argument(f"max_rows = {max_rows}: must be >= 1.")
    if max_bytes <= _MESSAGE_OVERHEAD:
        raise invalid_argument(f"max_bytes = {max_bytes}: must be > {_MESSAGE_OVERHEAD}.")
    budget = max_bytes - _MESSAGE_OVERHEAD
    slices: list[slice] = []
    start, n = 0, len(row_bytes)
    cumulative = np.concatenate([[0], np.cumsum(row_bytes)])
    while start < n:
        # Largest end with cumulative[end] - cumulative[start] <= budget.
        end = int(np.searchsorted(cumulative, cumulative[start] + budget, side="right")) - 1
        end = min(max(end, start + 1), start + max_rows, n)
        slices.append(slice(start, end))
        start = end
    return slices


def batch_request_id(request_id: str | None, index: int) -> str:
    """A fresh uuid4, or when the caller gave one, a stable UUID for batch ``index``.

    A stable id lets a caller repeat a whole ``ingest`` call after a crash: each batch is
    answered from its first result instead of being applied twice.
    """
    if request_id is None:
        return str(uuid.uuid4())
    return str(uuid.uuid5(_BATCH_ID_NAMESPACE, f"{request_id}/{index}"))


def _varint(value: int) -> bytes:
    """Protobuf base-128 varint of a non-negative int (protobuf encoding guide)."""
    out = bytearray()
    while value > 0x7F:
        out.append((value & 0x7F) | 0x80)
        value >>= 7
    out.append(value)
    return bytes(out)


def _merge_floats(message: Message, **columns: np.ndarray) -> None:
    """Append float32 arrays to the message's ``repeated float`` fields of those names.

    A proto3 ``repeated float`` travels packed: tag, byte length, then the values as
    little-endian float32 (protobuf encoding guide, "packed repeated fields"). Writing that
    from the array's bytes and merging it costs one parse in C, where ``.tolist()`` and
    ``extend`` make a Python float per value (about 10x slower for a 2,000-row batch).
    """
    encoded = bytearray()
    fields = message.DESCRIPTOR.fields_by_name
    for name, values in columns.items():
        data = np.ascontiguousarray(values, dtype="<f4").tobytes()
        encoded += _varint(fields[name].number << 3 | 2) + _varint(len(data)) + data
    message.MergeFromString(bytes(encoded))


def build_batches(
    pool: str,
    columns: IngestColumns,
    *,
    max_rows: int,
    max_bytes: int,
    request_id: str | None = None,
) -> Iterator[leadline_pb2.ItemBatch]:
    """ItemBatch messages covering every row once, in order, each with its request id."""
    for index, rows in enumerate(
        plan_batches(columns.row_bytes(), max_rows=max_rows, max_bytes=max_bytes)
    ):
        batch = leadline_pb2.ItemBatch(
            pool=pool,
            request_id=batch_request_id(request_id, index),
            item_ids=columns.item_ids[rows],
        )
        _merge_floats(batch, features=columns.features[rows], model_outputs=columns.outputs[rows])
        if columns.payload_refs is not None:
            batch.payload_refs.extend(columns.payload_refs[rows])
        if columns.segments is not None:
            batch.segments.extend(columns.segments[rows])
        if columns.event_time_ms is not None:
            batch.event_time_ms.extend(columns.event_time_ms[rows].tolist())
        yield batch


def build_validation_batches(
    pool: str,
    columns: ValidationColumns,
    *,
    max_rows: int,
    max_bytes: int,
    request_id: str | None = None,
) -> Iterator[leadline_pb2.ValidationBatch]:
    """ValidationBatch messages covering every row once, in order, each with its request id."""
    rows = columns.rows
    for index, part in enumerate(
        plan_batches(columns.row_bytes(), max_rows=max_rows, max_bytes=max_bytes)
    ):
        batch = leadline_pb2.ValidationBatch(
            pool=pool,
            request_id=batch_request_id(request_id, index),
            item_ids=rows.item_ids[part],
        )
        _merge_floats(batch, features=rows.features[part], model_outputs=rows.outputs[part])
        labels = columns.labels[part].tolist()
        if columns.classification:
            batch.class_labels.extend(labels)
        else:
            batch.values.extend(labels)
        if rows.segments is not None:
            batch.segments.extend(rows.segments[part])
        yield batch
