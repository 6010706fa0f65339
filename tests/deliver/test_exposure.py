"""Warnings for a password the config exposes: a world-readable password file
(the other-read bit, POSIX stat S_IROTH) and a password sent without TLS to a
broker that is not this machine (loopback names as RFC 6761 section 6.3 and
the standard library's ipaddress define them)."""

import io
import logging
import os

import pytest

from monitor.commands.cli import print_check
from monitor.config import MqttConfig, parse
from monitor.deliver.exposure import is_loopback, warnings
from monitor.deliver.mqtt import MqttSink
from rig import BASE


def password(tmp_path, mode):
    path = tmp_path / "mqtt.pw"
    path.write_text("s3cret\n")
    os.chmod(path, mode)
    return str(path)


@pytest.mark.parametrize("host", ["localhost", "LOCALHOST.", "broker.localhost", "127.0.0.1", "127.8.9.10",
                                  "::1", "[::1]"])
def test_loopback_hosts(host):
    assert is_loopback(host)


@pytest.mark.parametrize("host", ["broker.plant.example", "192.0.2.10", "2001:db8::1", "localhost.example"])
def test_other_hosts(host):
    assert not is_loopback(host)


def test_a_world_readable_password_file_is_named_with_its_mode(tmp_path):
    cfg = MqttConfig(username="pump-2", password_file=password(tmp_path, 0o644))
    assert [w for w in warnings(cfg) if "every user" in w and "0644" in w and "mqtt.pw" in w]
    cfg = MqttConfig(username="pump-2", password_file=password(tmp_path, 0o640))
    assert warnings(cfg) == []  # group-readable: the admin's choice


def test_a_password_in_clear_to_another_machine(tmp_path):
    pw = password(tmp_path, 0o600)
    clear = MqttConfig(host="broker.plant.example", username="pump-2", password_file=pw)
    assert [w for w in warnings(clear) if "broker.plant.example:1883 unencrypted" in w]
    assert warnings(MqttConfig(host="broker.plant.example", username="pump-2", password_file=pw, tls=True)) == []
    assert warnings(MqttConfig(host="127.0.0.1", username="pump-2", password_file=pw)) == []
    assert warnings(MqttConfig(host="broker.plant.example")) == []  # no password, nothing to expose


def test_check_prints_them_and_run_logs_them(tmp_path, caplog):
    pw = password(tmp_path, 0o604)
    text = BASE + f"""
[mqtt]
host = "broker.plant.example"
username = "pump-2"
password_file = "{pw}"
queue_dir = "{tmp_path / 'queue'}"
"""
    config = parse(text, "c.toml")
    out = io.StringIO()
    print_check(config, out)
    lines = [line for line in out.getvalue().splitlines() if line.startswith("warning: ")]
    assert len(lines) == 2
    with caplog.at_level(logging.WARNING, logger="bandwatch.delivery"):
        MqttSink(config.mqtt, config.node).close({})
    assert "every user" in caplog.text and "unencrypted" in caplog.text
