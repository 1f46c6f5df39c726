"""Replace one delimited section of a Markdown file, leaving every other byte alone.

Several benchmarks write into the same ``BENCHMARKS.md``; each owns the text between its
own pair of marker lines::

    <!-- NAME:start -->
    ...owned by the benchmark called NAME...
    <!-- NAME:end -->

Markers are HTML comments, so they do not show when the file is rendered.
"""

from __future__ import annotations

import re
from pathlib import Path

__all__ = ["end_marker", "replace_section", "start_marker"]

_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*")


def _check_name(name: str) -> str:
    if not isinstance(name, str) or not _NAME.fullmatch(name):
        raise ValueError(
            f"name = {name!r}: must be letters, digits, '.', '_' or '-' (starting with a "
            "letter or digit), e.g. 'system-benchmark'."
        )
    return name


def start_marker(name: str) -> str:
    """The line that opens section ``name``: ``<!-- NAME:start -->``."""
    return f"<!-- {_check_name(name)}:start -->"


def end_marker(name: str) -> str:
    """The line that closes section ``name``: ``<!-- NAME:end -->``."""
    return f"<!-- {_check_name(name)}:end -->"


# newline="" both ways: the bytes outside the section (CRLF included) stay exactly as found.
def _read(path: Path) -> str:
    with path.open(encoding="utf-8", newline="") as handle:
        return handle.read()


def _write(path: Path, text: str) -> None:
    with path.open("w", encoding="utf-8", newline="") as handle:
        handle.write(text)


def _marker_lines(lines: list[str], marker: str) -> list[int]:
    return [i for i, line in enumerate(lines) if line.rstrip("\r\n") == marker]


def replace_section(path: Path, name: str, body: str) -> None:
    """Put ``body`` between the ``name`` markers of ``path``, changing nothing else.

    The markers must each sit alone on a line. When the file lacks them, they are
    appended at the end (after one blank line) with ``body`` between them; a missing file
    is created. ``body`` is written as given, followed by a newline if it lacks one.

    Raises ValueError when ``name`` is not a simple identifier, when ``body`` contains
    either marker of ``name``, or when the file holds only one of the two markers, one of
    them twice, or the end marker before the start marker (the file is then left as it
    is: a human should look).
    """
    start, end = start_marker(name), end_marker(name)
    if start in body or end in body:
        raise ValueError(f"body contains a marker of section {name!r}; it must not.")
    if body and not body.endswith("\n"):
        body += "\n"
    path = Path(path)
    text = _read(path) if path.exists() else ""
    lines = text.splitlines(keepends=True)
    starts, ends = _marker_lines(lines, start), _marker_lines(lines, end)
    if not starts and not ends:
        prefix = text
        if prefix and not prefix.endswith("\n"):
            prefix += "\n"
        if prefix and not prefix.endswith("\n\n"):
            prefix += "\n"
        _write(path, f"{prefix}{start}\n{body}{end}\n")
        return
    if len(starts) != 1 or len(ends) != 1 or starts[0] > ends[0]:
        raise ValueError(
            f"{path}: section {name!r} has {len(starts)} start marker(s) at lines "
            f"{[i + 1 for i in starts]} and {len(ends)} end marker(s) at lines "
            f"{[i + 1 for i in ends]}; need exactly one of each, start first. Fix the file "
            "by hand."
        )
    head = "".join(lines[: starts[0] + 1])
    if not head.endswith("\n"):
        head += "\n"
    tail = "".join(lines[ends[0] :])
    _write(path, head + body + tail)
