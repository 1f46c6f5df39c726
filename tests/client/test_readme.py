"""The README's "Your own server in ten minutes" runs as written.

The section's code blocks are taken from README.md and run in order in an empty folder, as
a newcomer would type them: Python blocks are saved to the file named in their first
line, the block that is only ``leadline serve ...`` runs in the background (the first
terminal) until the end, every other shell block runs in bash with the environment the
blocks before it exported (the second terminal). The one change: the README uses the
default port 50051, which another run on this machine may hold, so the server and the
clients get a free loopback port through LEADLINE_LISTEN and LEADLINE_TARGET (the
environment variables the README names for them).
"""

from __future__ import annotations

import os
import re
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

_README = Path(__file__).resolve().parents[2] / "README.md"
_SECTION = "## Your own server in ten minutes"
_BLOCK = re.compile(r"^```(\w+)\n(.*?)^```$", re.MULTILINE | re.DOTALL)


def _blocks() -> list[tuple[str, str]]:
    text = _README.read_text(encoding="utf-8")
    start = text.index(_SECTION)
    end = text.find("\n## ", start + len(_SECTION))
    return _BLOCK.findall(text[start : end if end >= 0 else None])


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def _run_shell(block: str, env: dict[str, str], cwd: Path) -> tuple[str, dict[str, str]]:
    """Run a block in bash; its output and the environment it leaves behind."""
    env_file = cwd / ".env-after"
    script = f"set -euo pipefail\n{block}\nenv -0 > {env_file}\n"
    done = subprocess.run(
        ["bash", "-c", script],
        cwd=cwd,
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
        check=False,
    )
    assert done.returncode == 0, f"{block}\n--- stdout\n{done.stdout}\n--- stderr\n{done.stderr}"
    # A newcomer sees no traceback and no warning.
    assert "Traceback" not in done.stderr, done.stderr
    assert "Warning" not in done.stderr, done.stderr
    pairs = env_file.read_text().split("\0")
    after = dict(pair.split("=", 1) for pair in pairs if "=" in pair)
    return done.stdout, after


def test_your_own_server_in_ten_minutes_runs_as_written(tmp_path: Path) -> None:
    blocks = _blocks()
    assert [lang for lang, _ in blocks] == ["sh", "sh", "sh", "python", "sh"], blocks
    port = _free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("LEADLINE_")}
    # `. .venv/bin/activate`: this interpreter's environment first on the PATH.
    env["PATH"] = f"{Path(sys.executable).parent}{os.pathsep}{env.get('PATH', '')}"
    env["LEADLINE_LISTEN"] = env["LEADLINE_TARGET"] = f"127.0.0.1:{port}"
    server: subprocess.Popen[str] | None = None
    output = []
    try:
        for lang, block in blocks:
            if lang == "python":
                path = block.splitlines()[0].removeprefix("# ").strip()
                (tmp_path / path).write_text(block, encoding="utf-8")
            elif block.strip().startswith("leadline serve"):
                assert block.strip().count("\n") == 0, "the server block is one command"
                with (tmp_path / "server.log").open("w") as log:
                    server = subprocess.Popen(
                        ["bash", "-c", f"exec {block.strip()}"],
                        cwd=tmp_path,
                        env=env,
                        stdout=log,
                        stderr=subprocess.STDOUT,
                        text=True,
                    )
                deadline = time.monotonic() + 60
                while "leadline listening on" not in (tmp_path / "server.log").read_text():
                    assert server.poll() is None, (tmp_path / "server.log").read_text()
                    assert time.monotonic() < deadline, "the server did not start in 60 s"
                    time.sleep(0.1)
            else:
                out, env = _run_shell(block, env, tmp_path)
                output.append(out)
        assert server is not None
        server.send_signal(signal.SIGINT)  # Ctrl-C, as the README says
        assert server.wait(timeout=60) == 0
    finally:
        if server is not None and server.poll() is None:
            server.kill()
    text = "\n".join(output)
    assert "created pools/pets" in text
    assert "3000 items ingested" in text
    assert re.search(r"gate: (pass|fail|undecided) \(one-sided 95% upper bound 0\.\d{4}\)", text)
    assert re.search(r"^estimate\s+0\.\d{4} ± ", text, re.MULTILINE)
    assert (tmp_path / "first-hour" / "reports" / "pets.html").exists()
    draws = (tmp_path / "first-hour" / "draws.csv").read_text().splitlines()
    assert len(draws) == 1 + 200  # the header and the vendor's 200 draws
