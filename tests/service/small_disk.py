"""A real, small filesystem for full-disk tests: a tmpfs mounted in a private mount
namespace (``unshare -rm``, no root needed where unprivileged user namespaces are allowed).

Processes that must see it (the server) start under ``nsenter`` into that namespace; the
test reaches its files through ``/proc/<holder>/root``. Where the machine does not allow
this, the fixture skips with the reason (the SQLite-trigger fault tests still run).
"""

from __future__ import annotations

import contextlib
import errno
import shutil
import subprocess
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest


@dataclass(frozen=True)
class SmallFilesystem:
    mount_point: Path  # the path as the server sees it
    host_view: Path  # the same directory as this process sees it
    prefix: list[str]  # prepend to a command to run it inside the namespace

    def fill(self, name: str = "filler") -> int:
        """Write a file until the filesystem is full; returns its size."""
        path = self.host_view / name
        chunk = b"\0" * 65536
        written = 0
        with path.open("wb", buffering=0) as handle:
            while True:
                try:
                    written += handle.write(chunk)
                except OSError as error:
                    if error.errno != errno.ENOSPC:
                        raise
                    break
        # Fill the last partial chunk too.
        with path.open("ab", buffering=0) as handle, contextlib.suppress(OSError):
            while handle.write(b"\0" * 512):
                written += 512
        return written

    def free(self, name: str = "filler") -> None:
        (self.host_view / name).unlink()


@contextlib.contextmanager
def small_filesystem(mount_point: Path, *, size_mib: int) -> Iterator[SmallFilesystem]:
    unshare, nsenter = shutil.which("unshare"), shutil.which("nsenter")
    if unshare is None or nsenter is None:
        pytest.skip("full-disk test needs util-linux's unshare and nsenter to mount a tmpfs")
    mount_point.mkdir(parents=True, exist_ok=True)
    holder = subprocess.Popen(
        [
            unshare,
            "-rm",
            "sh",
            "-c",
            f'mount -t tmpfs -o size={size_mib}m leadline-test "$0" && echo mounted '
            "&& exec sleep 3600",
            str(mount_point),
        ],
        stdin=subprocess.DEVNULL,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        assert holder.stdout is not None
        assert holder.stderr is not None
        if holder.stdout.readline().strip() != "mounted":
            holder.wait(timeout=30)
            reason = holder.stderr.read().strip() or f"exit {holder.returncode}"
            pytest.skip(
                "cannot mount a small tmpfs as this user (unshare -rm, then mount -t tmpfs: "
                f"{reason}); the full-disk tests need a real small filesystem"
            )
        host_view = Path(f"/proc/{holder.pid}/root") / mount_point.relative_to("/")
        yield SmallFilesystem(
            mount_point=mount_point,
            host_view=host_view,
            prefix=[nsenter, "-t", str(holder.pid), "-U", "-m", "--preserve-credentials"],
        )
    finally:
        if holder.poll() is None:
            holder.kill()
        holder.wait(timeout=30)
        for stream in (holder.stdout, holder.stderr):
            if stream is not None:
                stream.close()
