"""Shared test helpers.

A test that needs an outside program (mosquitto, socat, systemd-analyze)
calls `need_program`; one that needs a disk that fills up or turns read-only
uses `small_disk` (a tmpfs, so root). Outside CI a missing program skips the test with the
reason; under CI=true it fails, so a missing install step can never pass
silently.
"""

import contextlib
import errno
import os
import shutil
import subprocess
from typing import Iterator

import pytest

IN_CI = os.environ.get("CI", "").lower() == "true"


def need_program(name: str) -> str:
    """Path of `name` on PATH (or in /usr/sbin); skip, or fail under CI=true."""
    path = shutil.which(name) or shutil.which(name, path="/usr/sbin:/sbin")
    if path:
        return path
    message = f"{name} is not installed; the README's test command installs it"
    if IN_CI:
        pytest.fail(message)
    pytest.skip(message)
    raise AssertionError("unreachable")


def _need_root_mount(what: str) -> None:
    if os.geteuid() != 0:
        message = f"{what} needs root to mount a small file system"
        if IN_CI:
            pytest.fail(message)
        pytest.skip(message)


@contextlib.contextmanager
def small_disk(path: str, size: str = "2m") -> Iterator[str]:
    """A tmpfs of `size` mounted at `path`, unmounted afterwards: a disk that
    fills up (see `fill`) or turns read-only (see `remount`) on demand. Skips
    where mounting is not allowed, and fails instead under CI=true."""
    _need_root_mount("a full or read-only disk")
    mount = need_program("mount")
    os.makedirs(path, exist_ok=True)
    done = subprocess.run([mount, "-t", "tmpfs", "-o", f"size={size}", "tmpfs", path],
                          capture_output=True, text=True)
    if done.returncode != 0:
        message = f"cannot mount a {size} tmpfs at {path}: {done.stderr.strip()}"
        if IN_CI:
            pytest.fail(message)
        pytest.skip(message)
    try:
        yield path
    finally:
        subprocess.run([need_program("umount"), "-l", path], capture_output=True)


def fill(path: str) -> str:
    """Fill the file system holding `path` with one file; returns its name
    (remove it to free the space)."""
    filler = os.path.join(path, "filler")
    fd = os.open(filler, os.O_WRONLY | os.O_CREAT, 0o600)
    try:
        chunk = b"\0" * 65536
        while True:
            try:
                os.write(fd, chunk)
            except OSError as err:
                if err.errno != errno.ENOSPC:
                    raise
                if len(chunk) == 1:
                    break
                chunk = chunk[: len(chunk) // 2]
    finally:
        os.close(fd)
    return filler


def remount(path: str, mode: str) -> None:
    """Remount the small disk at `path` read-only ("ro") or writable ("rw")."""
    subprocess.run([need_program("mount"), "-o", f"remount,{mode}", path], check=True, capture_output=True)
