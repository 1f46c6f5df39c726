"""Run a leadline server as a child process on a loopback port (demo, tests, notebooks).

The child is ``python -m leadline.client.cli serve ...``: the same entry point operators
use. We wait for its one line ``leadline listening on HOST:PORT`` on stderr, which it
prints once it accepts calls, and read the real port from it (we ask for port 0 first).
"""

from __future__ import annotations

import json
import logging
import re
import signal
import subprocess
import sys
import time
from collections.abc import Mapping, Sequence
from pathlib import Path

__all__ = ["LocalServer", "write_tokens_file"]

_LOG = logging.getLogger(__name__)
_LISTENING = re.compile(r"leadline listening on (\S+:\d+)")


def write_tokens_file(path: str | Path, tokens: Mapping[str, Sequence[str]]) -> Path:
    """Write the server's token file: a TOML ``[tokens]`` table, token -> list of roles."""
    lines = ["[tokens]"]
    for token, roles in tokens.items():
        # A JSON string of printable ASCII is also a valid TOML basic string.
        lines.append(f"{json.dumps(token)} = [{', '.join(json.dumps(r) for r in roles)}]")
    path = Path(path)
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    path.chmod(0o600)
    return path


class LocalServer:
    """A leadline server child process with its files under ``workdir``.

    ``workdir/data`` is the data directory, ``workdir/tokens.toml`` the token file (None:
    no tokens, ``--insecure-no-auth``) and ``workdir/server.log`` collects its stderr.
    ``start()`` returns the target ``host:port``; ``stop()`` sends SIGTERM and returns the
    exit code; ``restart()`` starts again on the same port and data directory.
    """

    def __init__(
        self,
        workdir: str | Path,
        *,
        tokens: Mapping[str, Sequence[str]] | None = None,
        host: str = "127.0.0.1",
        port: int = 0,
        extra_args: Sequence[str] = (),
        startup_timeout: float = 60.0,
    ) -> None:
        self.workdir = Path(workdir)
        self.tokens = dict(tokens) if tokens is not None else None
        self.host = host
        self.port = port
        self.extra_args = list(extra_args)
        self.startup_timeout = startup_timeout
        self.data_dir = self.workdir / "data"
        self.log_path = self.workdir / "server.log"
        self.target = ""
        self._process: subprocess.Popen[bytes] | None = None

    def __repr__(self) -> str:
        return f"LocalServer(target={self.target!r}, workdir={str(self.workdir)!r})"

    def __enter__(self) -> LocalServer:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    @property
    def running(self) -> bool:
        return self._process is not None and self._process.poll() is None

    @property
    def pid(self) -> int | None:
        return self._process.pid if self._process is not None else None

    def command(self) -> list[str]:
        """The argv that starts the server."""
        argv = [sys.executable, "-m", "leadline.client.cli", "serve"]
        argv += ["--data-dir", str(self.data_dir), "--listen", f"{self.host}:{self.port}"]
        if self.tokens is None:
            argv.append("--insecure-no-auth")
        else:
            argv += ["--tokens", str(self.workdir / "tokens.toml")]
        return argv + self.extra_args

    def start(self) -> str:
        """Start the child and wait until it listens; RuntimeError with its log otherwise."""
        if self.running:
            raise RuntimeError(f"server already running at {self.target}")
        self.workdir.mkdir(parents=True, exist_ok=True)
        self.data_dir.mkdir(mode=0o700, parents=True, exist_ok=True)
        if self.tokens is not None:
            write_tokens_file(self.workdir / "tokens.toml", self.tokens)
        offset = self.log_path.stat().st_size if self.log_path.exists() else 0
        with self.log_path.open("ab") as log:
            self._process = subprocess.Popen(
                self.command(), stdin=subprocess.DEVNULL, stdout=log, stderr=log
            )
        deadline = time.monotonic() + self.startup_timeout
        while time.monotonic() < deadline:
            text = self._log_text(offset)
            match = _LISTENING.search(text)
            if match:
                self.target = match.group(1)
                self.port = int(self.target.rsplit(":", 1)[1])
                _LOG.info("local leadline server listening on %s", self.target)
                return self.target
            if self._process.poll() is not None:
                raise RuntimeError(
                    f"leadline server exited with code {self._process.returncode} before "
                    f"listening; its log:\n{self._log_text(offset)[-4000:]}"
                )
            time.sleep(0.05)
        self.kill()
        raise RuntimeError(
            f"leadline server did not listen within {self.startup_timeout} s; its log:\n"
            f"{self._log_text(offset)[-4000:]}"
        )

    def stop(self, *, timeout: float = 30.0) -> int | None:
        """SIGTERM, wait up to ``timeout`` s (then SIGKILL); the exit code, None if not started."""
        process = self._process
        if process is None:
            return None
        if process.poll() is None:
            process.send_signal(signal.SIGTERM)
            try:
                process.wait(timeout=timeout)
            except subprocess.TimeoutExpired:
                _LOG.warning(
                    "server pid %d ignored SIGTERM for %s s; killing", process.pid, timeout
                )
                process.kill()
                process.wait()
        return process.returncode

    def kill(self) -> None:
        """SIGKILL the child: a crash, no shutdown work."""
        process = self._process
        if process is not None and process.poll() is None:
            process.kill()
            process.wait()

    def restart(self, *, timeout: float = 30.0) -> str:
        """Stop (if running) and start again on the same port and data directory."""
        self.stop(timeout=timeout)
        return self.start()

    def log(self) -> str:
        """Everything the server wrote to stderr so far."""
        return self._log_text(0)

    def _log_text(self, offset: int) -> str:
        try:
            with self.log_path.open("rb") as log:
                log.seek(offset)
                return log.read().decode("utf-8", "replace")
        except FileNotFoundError:
            return ""
