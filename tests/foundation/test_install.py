"""A normal (non-editable) install exposes the three packages of the `leadline` namespace."""

from __future__ import annotations

import os
import subprocess
import sys
import zipfile
from pathlib import Path

_ROOT = Path(__file__).resolve().parents[2]


def test_wheel_install_imports_from_outside_the_repo(tmp_path: Path) -> None:
    wheel_dir = tmp_path / "wheel"
    target = tmp_path / "site"
    built = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--quiet", "--no-deps", "-w", str(wheel_dir), "."],
        cwd=_ROOT,
        check=True,
        capture_output=True,
        text=True,
    )
    # The build backend warns about nothing in pyproject.toml (a `license` table was
    # deprecated; the SPDX string form is current, setuptools >= 77). Lines about the
    # machine's own pip index configuration are not the project's.
    backend = [line for line in built.stderr.splitlines() if "Location 'file:" not in line]
    assert not [line for line in backend if "Warning" in line or "deprecated" in line], built.stderr
    wheels = list(wheel_dir.glob("leadline-*.whl"))
    assert len(wheels) == 1, wheels
    with zipfile.ZipFile(wheels[0]) as wheel:
        (name,) = [n for n in wheel.namelist() if n.endswith(".dist-info/METADATA")]
        assert "License-Expression: Apache-2.0" in wheel.read(name).decode().splitlines()
    subprocess.run(
        [sys.executable, "-m", "pip", "install", "--quiet", "--no-deps", "--target", str(target)]
        + [str(wheels[0])],
        check=True,
    )
    # Run from an empty folder with only the installed copy on the path (site-packages
    # still supplies numpy, grpc, ...), and check the modules really come from it.
    code = (
        "import leadline.service, leadline.client, leadline.v1, leadline.v1.leadline_pb2\n"
        "import leadline.service.estimation\n"
        "print(leadline.v1.leadline_pb2.__file__)\n"
    )
    env = {**os.environ, "PYTHONPATH": str(target)}
    out = subprocess.run(
        [sys.executable, "-I", "-c", f"import sys; sys.path.insert(0, {str(target)!r})\n" + code],
        cwd=tmp_path,
        env=env,
        check=True,
        capture_output=True,
        text=True,
    ).stdout
    assert out.strip().startswith(str(target)), out
