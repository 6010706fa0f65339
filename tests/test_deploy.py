"""The service unit and the install scripts in deploy/.

The unit is checked by the real systemd-analyze (syntax, the settings systemd
actually ends up with, and its security exposure) and textually for the
settings the program relies on. The scripts are checked with `bash -n` and
shellcheck; they are never run here, because they change the system.
"""

from __future__ import annotations

import fnmatch
import os
import re
import subprocess
from pathlib import Path
from typing import Dict, List, Optional

import pytest

from conftest import need_program

ROOT = Path(__file__).resolve().parent.parent
DEPLOY = ROOT / "deploy"
UNIT = DEPLOY / "bandwatch.service"
SCRIPTS = [DEPLOY / "install.sh", DEPLOY / "uninstall.sh"]

VENV = "/opt/bandwatch/venv"
EXEC_START = f"{VENV}/bin/bandwatch run -c /etc/bandwatch/bandwatch.toml"
# Device groups (as in /proc/devices) of USB serial adapters and CDC-ACM boards.
SERIAL_GROUPS = ("ttyUSB", "ttyACM")
TRUE = {"1", "yes", "true", "on"}


def parse_unit(text: str) -> Dict[str, Dict[str, List[str]]]:
    """Unit file as {section: {key: [values in order]}}; keys may repeat."""
    sections: Dict[str, Dict[str, List[str]]] = {}
    current: Optional[Dict[str, List[str]]] = None
    pending = ""
    for raw in text.splitlines():
        line = pending + raw.strip()
        pending = ""
        if line.endswith("\\"):
            pending = line[:-1] + " "
            continue
        if not line or line[0] in "#;":
            continue
        if line.startswith("[") and line.endswith("]"):
            current = sections.setdefault(line[1:-1], {})
            continue
        assert current is not None, f"setting outside a section: {line!r}"
        key, sep, value = line.partition("=")
        assert sep, f"not a key=value line: {line!r}"
        current.setdefault(key.strip(), []).append(value.strip())
    return sections


def last(settings: Dict[str, List[str]], key: str, default: str = "") -> str:
    values = settings.get(key)
    return values[-1] if values else default


def words(settings: Dict[str, List[str]], key: str) -> List[str]:
    """A list setting: values accumulate; an empty assignment resets the list."""
    result: List[str] = []
    for value in settings.get(key, []):
        result = result + value.split() if value else []
    return result


def device_allows(entries: List[str], group: str) -> bool:
    """True if one DeviceAllow= entry grants read and write on every node of a char group."""
    for entry in entries:
        spec, _, access = entry.partition(" ")
        access = access.strip() or "rwm"  # no access string means all
        if (
            spec.startswith("char-")
            and fnmatch.fnmatchcase(group, spec[len("char-"):])
            and "r" in access
            and "w" in access
        ):
            return True
    return False


def serial_access_problem(service: Dict[str, List[str]]) -> Optional[str]:
    """Why the unit would keep the program from /dev/ttyUSB* and /dev/ttyACM*, or None."""
    if last(service, "PrivateDevices").lower() in TRUE:
        # A private /dev holds only pseudo devices; DeviceAllow= cannot add nodes to it.
        return "PrivateDevices= gives the service a /dev without serial ports"
    allow = [v for v in service.get("DeviceAllow", []) if v]
    policy = last(service, "DevicePolicy", "auto").lower()
    if last(service, "ProtectClock").lower() in TRUE:
        allow.append("char-rtc r")  # systemd.exec(5): ProtectClock= implies this
    if policy == "auto" and not allow:
        return None  # no device allow-list at all; file permissions decide
    missing = [g for g in SERIAL_GROUPS if not device_allows(allow, g)]
    if missing:
        return (
            f"the device allow-list (DevicePolicy={policy}, DeviceAllow={allow}) "
            f"does not grant rw on char-{', char-'.join(missing)}"
        )
    return None


@pytest.fixture(scope="module")
def unit_text() -> str:
    return UNIT.read_text(encoding="utf-8")


@pytest.fixture(scope="module")
def service(unit_text: str) -> Dict[str, List[str]]:
    return parse_unit(unit_text)["Service"]


@pytest.fixture()
def testable_unit(tmp_path: Path, unit_text: str) -> Path:
    """The unit with ExecStart= pointed at a real executable, so that
    systemd-analyze checks the command instead of stopping at its absence."""
    program = tmp_path / "bandwatch"
    program.write_text("#!/bin/sh\nexit 0\n", encoding="utf-8")
    program.chmod(0o755)
    assert f"ExecStart={EXEC_START}\n" in unit_text
    unit = tmp_path / "bandwatch.service"
    unit.write_text(unit_text.replace(f"{VENV}/bin/bandwatch", str(program)), encoding="utf-8")
    return unit


def analyze(*args: str, log_level: str = "info") -> subprocess.CompletedProcess:
    exe = need_program("systemd-analyze")
    env = dict(os.environ, SYSTEMD_LOG_LEVEL=log_level, SYSTEMD_LOG_COLOR="0", SYSTEMD_PAGER="")
    return subprocess.run(
        [exe, *args], capture_output=True, text=True, env=env, timeout=120, check=False
    )


def verify(unit: Path, log_level: str = "info") -> subprocess.CompletedProcess:
    # --recursive-errors=no: a warning about this unit (not about the host's
    # other units) makes the exit status non-zero; --man=no: no man lookups.
    return analyze("verify", "--man=no", "--recursive-errors=no", str(unit), log_level=log_level)


def complaints(result: subprocess.CompletedProcess, unit: Path) -> List[str]:
    lines = (result.stdout + result.stderr).splitlines()
    return [line for line in lines if unit.name in line or str(unit) in line]


# --- systemd-analyze -----------------------------------------------------------


def test_unit_verifies_cleanly(testable_unit: Path) -> None:
    result = verify(testable_unit)
    assert complaints(result, testable_unit) == []
    assert result.returncode == 0, result.stdout + result.stderr


def test_verify_catches_a_broken_unit(testable_unit: Path) -> None:
    # Proves the check above has teeth in this environment.
    text = testable_unit.read_text(encoding="utf-8")
    testable_unit.write_text(
        text.replace("WatchdogSec=30s", "WatchdogSec=thirty\nProtectSystm=strict"),
        encoding="utf-8",
    )
    result = verify(testable_unit)
    found = "\n".join(complaints(result, testable_unit))
    assert result.returncode != 0
    assert "ProtectSystm" in found and "thirty" in found, found


def effective_settings(unit: Path) -> Dict[str, List[str]]:
    """The settings systemd loaded, implied ones included, from verify's debug dump."""
    result = verify(unit, log_level="debug")
    assert result.returncode == 0, result.stderr[-3000:]
    settings: Dict[str, List[str]] = {}
    inside = False
    for line in result.stdout.splitlines():
        if line.startswith("\t-> Unit "):
            inside = line.strip() == f"-> Unit {unit.name}:"
            continue
        if inside and line.startswith("\t\t") and not line.startswith("\t\t\t"):
            key, sep, value = line.strip().partition(":")
            if sep and not key.startswith("->"):
                settings.setdefault(key, []).append(value.strip())
    assert settings, "no dump of the unit in systemd-analyze's debug output"
    return settings


def test_systemd_loads_the_intended_settings(testable_unit: Path) -> None:
    loaded = effective_settings(testable_unit)
    expect = {
        "Type": "notify",
        "NotifyAccess": "main",
        "Restart": "on-failure",
        "WatchdogSec": "30s",
        "User": "bandwatch",
        "Group": "bandwatch",
        "StateDirectory": "bandwatch",
        "ConfigurationDirectory": "bandwatch",
        "ProtectSystem": "strict",
        "PrivateDevices": "no",
    }
    got = {key: last(loaded, key) for key in expect}
    assert got == expect
    assert "dialout" in words(loaded, "SupplementaryGroups")
    # The device rules systemd will enforce, implied ones included: either no
    # allow-list at all, or one that covers the serial ports.
    policy = last(loaded, "DevicePolicy")
    allow = loaded.get("DeviceAllow", [])
    no_allow_list = policy == "auto" and not allow
    assert no_allow_list or all(device_allows(allow, g) for g in SERIAL_GROUPS), (policy, allow)


def test_unit_keeps_its_hardening(testable_unit: Path) -> None:
    # systemd-analyze rates exposure 0..10 (shown) or 0..100 (threshold); the
    # unit is at about 1.7. The margin absorbs small changes but not dropping
    # the sandbox.
    result = analyze("security", "--offline=yes", "--threshold=25", str(testable_unit))
    tail = "\n".join(result.stdout.splitlines()[-3:])
    assert result.returncode == 0, tail + result.stderr


# --- what the program and the scripts rely on ------------------------------------


def test_unit_key_settings(service: Dict[str, List[str]]) -> None:
    assert last(service, "Type") == "notify"
    assert last(service, "NotifyAccess") == "main"
    assert service["ExecStart"] == [EXEC_START]
    assert last(service, "ExecReload") == "/bin/kill -HUP $MAINPID"
    assert last(service, "User") == "bandwatch"
    assert "dialout" in words(service, "SupplementaryGroups")
    # /var/lib/bandwatch is the default queue_dir of the config.
    assert last(service, "StateDirectory") == "bandwatch"
    assert last(service, "ConfigurationDirectory") == "bandwatch"
    assert last(service, "Restart") == "on-failure"
    assert "2" in words(service, "RestartPreventExitStatus")  # exit 2: bad config


def test_unit_leaves_serial_ports_reachable(service: Dict[str, List[str]]) -> None:
    assert serial_access_problem(service) is None


@pytest.mark.parametrize(
    "extra, blocked",
    [
        ("PrivateDevices=yes", True),
        ("ProtectClock=yes", True),
        ("DevicePolicy=closed\nDeviceAllow=char-ttyUSB rw", True),
        ("DevicePolicy=closed\nDeviceAllow=char-ttyUSB rw\nDeviceAllow=char-ttyACM r", True),
        ("DevicePolicy=closed\nDeviceAllow=char-ttyUSB rw\nDeviceAllow=char-ttyACM rw", False),
        ("ProtectClock=yes\nDeviceAllow=char-tty* rw", False),
        ("PrivateDevices=no", False),
    ],
)
def test_serial_access_check_itself(extra: str, blocked: bool) -> None:
    service = parse_unit(f"[Service]\nUser=bandwatch\n{extra}\n")["Service"]
    assert (serial_access_problem(service) is not None) == blocked


def test_install_script_matches_the_unit() -> None:
    install = (DEPLOY / "install.sh").read_text(encoding="utf-8")
    # install.sh rewrites this path when BANDWATCH_VENV is set; it must be the
    # one ExecStart= uses.
    assert re.search(rf"^readonly UNIT_VENV={re.escape(VENV)}$", install, re.M)
    assert re.search(r"^readonly CONFIG_FILE=\$CONFIG_DIR/bandwatch\.toml$", install, re.M)
    assert re.search(r"^readonly CONFIG_DIR=/etc/bandwatch$", install, re.M)
    assert '"$HERE/$SERVICE.service"' in install and UNIT.name == "bandwatch.service"


# --- the scripts -------------------------------------------------------------------


@pytest.mark.parametrize("script", SCRIPTS, ids=lambda p: p.name)
def test_script_is_strict_bash(script: Path) -> None:
    text = script.read_text(encoding="utf-8")
    assert text.startswith("#!/usr/bin/env bash\n")
    assert "\nset -euo pipefail\n" in text
    assert os.access(script, os.X_OK), f"{script} is not executable"


@pytest.mark.parametrize("script", SCRIPTS, ids=lambda p: p.name)
def test_script_parses(script: Path) -> None:
    result = subprocess.run(
        ["bash", "-n", str(script)], capture_output=True, text=True, check=False
    )
    assert result.returncode == 0, result.stderr


@pytest.mark.parametrize("script", SCRIPTS, ids=lambda p: p.name)
def test_script_passes_shellcheck(script: Path) -> None:
    shellcheck = need_program("shellcheck")
    result = subprocess.run(
        [shellcheck, "--shell=bash", "--severity=style", str(script)],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert result.returncode == 0, result.stdout + result.stderr
