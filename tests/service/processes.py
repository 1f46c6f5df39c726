"""`leadline serve` as a child process, the way operators run it: start, read the port from
the listening line, stop with SIGTERM or SIGKILL, read its exit code and stderr."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

from tests.service.helpers import write_tokens

_LISTENING = "leadline listening on "


def serve_command(data_dir: Path, tokens: Path, *extra: str) -> list[str]:
    return [
        sys.executable,
        "-m",
        "leadline.service",
        "serve",
        "--data-dir",
        str(data_dir),
        "--listen",
        "127.0.0.1:0",
        "--tokens",
        str(tokens),
        *extra,
    ]


class ServerProcess:
    """One ``leadline serve`` child; its stderr goes to ``log`` (a file, read any time)."""

    def __init__(
        self,
        data_dir: Path,
        tokens: Path,
        *extra: str,
        prefix: list[str] | None = None,
        log_dir: Path | None = None,
    ):
        self.data_dir = data_dir
        folder = log_dir or data_dir.parent
        self.log_path = folder / f"{data_dir.name}-server-{time.monotonic_ns()}.log"
        self.command = [*(prefix or []), *serve_command(data_dir, tokens, *extra)]
        with self.log_path.open("wb") as log:
            self.process = subprocess.Popen(
                self.command, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=log
            )
        self.port = 0

    @property
    def pid(self) -> int:
        return self.process.pid

    def log(self) -> str:
        return self.log_path.read_text(encoding="utf-8", errors="replace")

    def wait_listening(self, timeout: float = 60.0) -> int:
        """The port once the server listens; AssertionError (with the log) if it exits."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            for line in self.log().splitlines():
                if line.startswith(_LISTENING):
                    self.port = int(line.rsplit(":", 1)[1])
                    return self.port
            if self.process.poll() is not None:
                raise AssertionError(
                    f"server exited with {self.process.returncode} before listening:\n{self.log()}"
                )
            time.sleep(0.05)
        raise AssertionError(f"server did not listen within {timeout} s:\n{self.log()}")

    def metrics_port(self) -> int:
        """The metrics port from the log line "metrics on http://HOST:PORT/metrics"."""
        for line in self.log().splitlines():
            if "metrics on http://" in line:
                return int(line.rsplit(":", 1)[1].split("/", 1)[0])
        raise AssertionError(f"no metrics line in the log:\n{self.log()}")

    def wait_exit(self, timeout: float = 60.0) -> int | None:
        """The exit code, or None if it still runs after ``timeout``."""
        try:
            return self.process.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            return None

    def terminate(self, timeout: float = 60.0) -> int:
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
        code = self.wait_exit(timeout)
        assert code is not None, f"server ignored SIGTERM for {timeout} s:\n{self.log()}"
        return code

    def kill(self) -> None:
        if self.process.poll() is None:
            os.kill(self.process.pid, signal.SIGKILL)
        self.process.wait(timeout=30)


def tokens_file(folder: Path) -> Path:
    return write_tokens(folder / "tokens.toml")
