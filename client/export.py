"""Draws and their labels as CSV, one row per draw, and back.

Columns (header row first), in draw order:

``draw_index, item_id, segment, status, selection_probability, expected_loss,
surrogate_version, remaining_count, class_label, value, loss, labeler, draw_time_ms,
label_time_ms, skip_reason``

``status`` is one of assigned / labeled / skipped / waiting. ``class_label`` or ``value``
is filled for a labeled draw (by the pool's task), ``loss`` is empty unless labeled.
Floats are written with Python's shortest exact representation, so reading the file
back gives the very same numbers.

Text cells (item_id, segment, labeler, skip_reason) come from other programs and people.
A spreadsheet would run a cell starting with ``=``, ``+``, ``-``, ``@``, a tab or a carriage
return as a formula (CSV / formula injection), so such a cell is written with a ``'`` in
front, as the OWASP "CSV Injection" guidance advises; a cell that itself starts with ``'``
gets one more, so :func:`read_draws_csv` removes exactly one and reads back the original.
"""

from __future__ import annotations

import csv
from collections.abc import Iterable
from pathlib import Path
from typing import TextIO

from leadline.client._enums import enum_name, parse_enum
from leadline.client._errors import InvalidRequest
from leadline.v1 import leadline_pb2

__all__ = ["CSV_COLUMNS", "read_draws_csv", "write_draws_csv"]

CSV_COLUMNS = (
    "draw_index",
    "item_id",
    "segment",
    "status",
    "selection_probability",
    "expected_loss",
    "surrogate_version",
    "remaining_count",
    "class_label",
    "value",
    "loss",
    "labeler",
    "draw_time_ms",
    "label_time_ms",
    "skip_reason",
)


# OWASP, "CSV Injection": the characters that make a spreadsheet cell a formula.
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")
_NEUTRAL = "'"
_TEXT_COLUMNS = ("item_id", "segment", "labeler", "skip_reason")


def neutralise(text: str) -> str:
    """A text cell a spreadsheet shows as text, never runs (reversed by :func:`restore`)."""
    if text.startswith(_FORMULA_START) or text.startswith(_NEUTRAL):
        return _NEUTRAL + text
    return text


def restore(cell: str) -> str:
    """The text :func:`neutralise` was given."""
    return cell[1:] if cell.startswith(_NEUTRAL) else cell


def _row(draw: leadline_pb2.Draw) -> list[str]:
    label = draw.WhichOneof("label")
    labeled = draw.status == leadline_pb2.DRAW_STATUS_LABELED
    return [
        str(draw.draw_index),
        neutralise(draw.item_id),
        neutralise(draw.segment),
        enum_name("DrawStatus", draw.status),
        repr(draw.selection_probability),
        repr(draw.expected_loss),
        str(draw.surrogate_version),
        str(draw.remaining_count),
        str(draw.class_label) if label == "class_label" else "",
        repr(draw.value) if label == "value" else "",
        repr(draw.loss) if labeled else "",
        neutralise(draw.labeler),
        str(draw.draw_time_ms),
        str(draw.label_time_ms),
        neutralise(draw.skip_reason),
    ]


def write_draws_csv(draws: Iterable[leadline_pb2.Draw], out: str | Path | TextIO) -> int:
    """Write the header and one row per draw to a path or an open text file; rows written."""
    if isinstance(out, str | Path):
        with Path(out).open("w", newline="", encoding="utf-8") as handle:
            return write_draws_csv(draws, handle)
    # RFC 4180 line ends: the csv module then also quotes a cell holding a lone CR.
    writer = csv.writer(out, lineterminator="\r\n")
    writer.writerow(CSV_COLUMNS)
    count = 0
    for draw in draws:
        writer.writerow(_row(draw))
        count += 1
    return count


def read_draws_csv(source: str | Path | TextIO) -> list[leadline_pb2.Draw]:
    """Parse a file written by :func:`write_draws_csv` back into Draw messages.

    ValueError names the line and column of anything that does not parse.
    """
    if isinstance(source, str | Path):
        with Path(source).open(newline="", encoding="utf-8") as handle:
            return read_draws_csv(handle)
    reader = csv.reader(source)
    header = next(reader, None)
    if header is None or tuple(header) != CSV_COLUMNS:
        raise ValueError(f"CSV header is {header!r}, expected {','.join(CSV_COLUMNS)}.")
    draws = []
    for line_number, row in enumerate(reader, start=2):
        if len(row) != len(CSV_COLUMNS):
            raise ValueError(
                f"line {line_number}: {len(row)} columns, expected {len(CSV_COLUMNS)}."
            )
        fields = dict(zip(CSV_COLUMNS, row, strict=True))
        for column in _TEXT_COLUMNS:
            fields[column] = restore(fields[column])
        try:
            draw = leadline_pb2.Draw(
                draw_index=int(fields["draw_index"]),
                item_id=fields["item_id"],
                segment=fields["segment"],
                status=parse_enum("DrawStatus", fields["status"], field="status"),
                selection_probability=float(fields["selection_probability"]),
                expected_loss=float(fields["expected_loss"]),
                surrogate_version=int(fields["surrogate_version"]),
                remaining_count=int(fields["remaining_count"]),
                labeler=fields["labeler"],
                draw_time_ms=int(fields["draw_time_ms"]),
                label_time_ms=int(fields["label_time_ms"]),
                skip_reason=fields["skip_reason"],
            )
            if fields["class_label"]:
                draw.class_label = int(fields["class_label"])
            elif fields["value"]:
                draw.value = float(fields["value"])
            if fields["loss"]:
                draw.loss = float(fields["loss"])
        except ValueError as error:
            raise ValueError(f"line {line_number}: {error}") from None
        except InvalidRequest as error:  # an unknown status word
            raise ValueError(f"line {line_number}: {error.details}") from None
        draws.append(draw)
    return draws
