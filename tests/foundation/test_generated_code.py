"""The committed generated code is importable and identical to a fresh `make proto`."""

from __future__ import annotations

import importlib
import subprocess
import sys
from pathlib import Path

import pytest

_ROOT = Path(__file__).resolve().parents[2]
_PROTO_ROOT = _ROOT / "proto"
_GENERATED = ("leadline_pb2.py", "leadline_pb2.pyi", "leadline_pb2_grpc.py")


@pytest.mark.parametrize("module", ["leadline.v1.leadline_pb2", "leadline.v1.leadline_pb2_grpc"])
def test_generated_module_imports(module: str) -> None:
    assert importlib.import_module(module).__name__ == module


def test_generated_code_matches_proto_source(tmp_path: Path) -> None:
    # Same command as `make proto`, into a temporary folder.
    subprocess.run(
        [
            sys.executable,
            "-m",
            "grpc_tools.protoc",
            f"-I{_PROTO_ROOT}",
            f"--python_out={tmp_path}",
            f"--pyi_out={tmp_path}",
            f"--grpc_python_out={tmp_path}",
            str(_PROTO_ROOT / "leadline" / "v1" / "leadline.proto"),
        ],
        check=True,
    )
    stale = [
        name
        for name in _GENERATED
        if (tmp_path / "leadline" / "v1" / name).read_bytes()
        != (_PROTO_ROOT / "leadline" / "v1" / name).read_bytes()
    ]
    assert not stale, f"generated code is stale: {stale}; run `make proto` and commit the result"
