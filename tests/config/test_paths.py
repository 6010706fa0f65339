"""Relative paths in a config are taken from the config file's folder
(README, Config reference), whatever the working directory: a choice of this
project, so a config and the files beside it move together and systemd
(working directory `/`) reads the same files as a shell.
"""

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np

from monitor.acquire.recording import RecordingWriter
from monitor.config import load

ROOT = Path(__file__).resolve().parents[2]

CONFIG = """
[node]
name = "paths-1"
[source]
kind = "file"
path = "{path}"
channels = ["x"]
unit = "g"
[spectrum]
size = 1024
[[band]]
name = "tone"
hz = [40.0, 60.0]
quantity = "acceleration"
warning = 0.5
delay = 0.0
[capture]
seconds = 1.0
after = 0.5
dir = "{capture}"
"""

MQTT = """
[mqtt]
username = "node"
password_file = "secret/password"
tls = true
ca_file = "tls/ca.pem"
cert_file = "tls/node.pem"
key_file = "/etc/ssl/node.key"
queue_dir = "state"
"""


def test_every_relative_path_key_is_joined_to_the_config_folder(tmp_path):
    folder = tmp_path / "site"
    folder.mkdir()
    path = folder / "node.toml"
    path.write_text(CONFIG.format(path="recordings/run.wav", capture="captures") + MQTT, encoding="utf-8")
    config = load(str(path))
    assert config.source.path == str(folder / "recordings" / "run.wav")
    assert config.capture.dir == str(folder / "captures")
    m = config.mqtt
    assert (m.queue_dir, m.password_file, m.ca_file, m.cert_file) == (
        str(folder / "state"), str(folder / "secret" / "password"), str(folder / "tls" / "ca.pem"),
        str(folder / "tls" / "node.pem"))
    assert m.key_file == "/etc/ssl/node.key"  # absolute: kept as written


def test_a_config_given_by_a_relative_name_resolves_from_its_folder(tmp_path, monkeypatch):
    folder = tmp_path / "site"
    folder.mkdir()
    (folder / "node.toml").write_text(CONFIG.format(path="run.wav", capture="captures"), encoding="utf-8")
    monkeypatch.chdir(tmp_path)
    assert load("site/node.toml").source.path == str(folder / "run.wav")
    monkeypatch.chdir(folder)
    assert load("node.toml").source.path == str(folder / "run.wav")


def test_run_from_another_folder_reads_the_recording_and_writes_captures_beside_the_config(tmp_path):
    folder = tmp_path / "site"
    elsewhere = tmp_path / "elsewhere"
    folder.mkdir()
    elsewhere.mkdir()
    fs = 2048
    t = np.arange(6 * fs) / fs
    # A 50 Hz tone of RMS 0.2 g, then 1 g from 3 s on: above the 0.5 g warning.
    x = np.sqrt(2) * np.where(t < 3.0, 0.2, 1.0) * np.sin(2 * np.pi * 50 * t)
    with RecordingWriter(str(folder / "run.wav"), fs, ["x"], "g") as writer:
        writer.write(x[:, None])
    (folder / "node.toml").write_text(CONFIG.format(path="run.wav", capture="captures"), encoding="utf-8")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    result = subprocess.run([sys.executable, "-m", "monitor", "run", "-c", "../site/node.toml"], cwd=str(elsewhere),
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, timeout=60)
    assert result.returncode == 0, result.stderr
    events = [json.loads(line)["payload"] for line in result.stdout.splitlines()
              if json.loads(line)["topic"].endswith("/event")]
    raised = [e for e in events if e["name"] == "tone" and e["level"] == "warning"]
    assert raised, result.stdout
    # The event names the capture file; it lies in the config's folder.
    assert [p.name for p in (folder / "captures").iterdir()] == [raised[0]["capture"]]
    assert list(elsewhere.iterdir()) == []  # nothing written where the command was typed


def test_the_mqtt_section_alone_resolves_the_same_way(tmp_path):
    # `bandwatch collect` reads only [mqtt] (README, Evidence for the analyst).
    from monitor.config.load import load_mqtt

    folder = tmp_path / "analyst"
    folder.mkdir()
    (folder / "analyst.toml").write_text(MQTT, encoding="utf-8")
    m = load_mqtt(str(folder / "analyst.toml"))
    assert (m.password_file, m.ca_file, m.key_file) == (
        str(folder / "secret" / "password"), str(folder / "tls" / "ca.pem"), "/etc/ssl/node.key")
