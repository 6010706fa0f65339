"""Shared test helpers.

A test that needs an outside program (mosquitto, socat, systemd-analyze)
calls `need_program`. Outside CI a missing program skips the test with the
reason; under CI=true it fails, so a missing install step can never pass
silently.
"""

import os
import shutil

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
