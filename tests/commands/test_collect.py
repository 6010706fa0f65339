"""Evidence on the broker, end to end against a real mosquitto on loopback:
a band rise sends its spectrum and capture with the event's id, `bandwatch
collect` files them (the numbers equal the monitor's own spectrum), nothing
is lost to a broker outage or a collector that is away, the capture queue
keeps its bound, and hostile names off the wire cannot leave the folder.

MQTT 3.1.1 (OASIS 2014) section 3.1.2.4: with Clean Session 0 the broker
keeps the session and its QoS 1 messages while the client is away; section
4.3.2: QoS 1 is delivered at least once.
"""

import json
import os
import signal
import subprocess
import sys
import threading
import time
from dataclasses import replace

import numpy as np
import pytest
import scipy.io.wavfile
import scipy.signal

from monitor.commands.collect import Collector as CollectClient
from monitor.commands.spectrum_plot import draw_spectrum
from monitor.config import MqttConfig, parse
from monitor.deliver.base import Sink
from monitor.deliver.capture_message import capture_notice, pack
from monitor.deliver.mqtt import MqttSink
from monitor.deliver.filing import Filer
from monitor.deliver.payloads import encode
from monitor.service.monitor import Monitor
from monitor.acquire.recording import RecordingWriter
from monitor.acquire.sources.memory import ArraySource
from mqtt_broker import Broker, make_certs, make_client, wait_for
from rig import CAPTURE, FS, scenario
from test_replay import need_matplotlib

pytestmark = pytest.mark.filterwarnings("ignore::scipy.io.wavfile.WavFileWarning")

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
PREFIX = "plant"


class Keeping(Sink):
    """Hands everything to the real sink and keeps what the pipeline sent."""

    def __init__(self, inner):
        self.inner = inner
        self.messages = []

    def open(self, online, offline):
        self.inner.open(online, offline)

    def send(self, suffix, payload):
        self.messages.append((suffix, payload))
        self.inner.send(suffix, payload)

    def close(self, offline):
        self.inner.close(offline)

    def of(self, suffix):
        return [p for s, p in self.messages if s == suffix]

    queued = property(lambda self: self.inner.queued)
    dropped = property(lambda self: self.inner.dropped)
    evidence_queued = property(lambda self: self.inner.evidence_queued)
    evidence_dropped = property(lambda self: self.inner.evidence_dropped)


def mqtt_config(broker, tmp_path, **kw):
    cfg = MqttConfig(host=broker.host, port=broker.port, prefix=PREFIX, keepalive=5,
                     queue_dir=str(tmp_path / "queue"))
    return replace(cfg, **kw)


def node_config(tmp_path):
    # The capture test's band and captures, keeping every capture file.
    return parse(CAPTURE.format(dir=tmp_path / "captures").replace("keep = 2", "keep = 20"))


def run_node(config, mqtt_cfg, x, block=300):
    sink = Keeping(MqttSink(mqtt_cfg, config.node, reconnect_min=0.1, reconnect_max=0.5))
    monitor = Monitor(config, ArraySource(config.source, x, block=block), sink)
    monitor.run()
    return sink


def start_collector(mqtt_cfg, out, client_id="analyst-1"):
    filer = Filer(str(out), draw=draw_spectrum)
    collector = CollectClient(mqtt_cfg, filer, client_id, reconnect_min=0.1, reconnect_max=0.5)
    collector.start()
    assert collector.subscribed.wait(10), "the collector did not subscribe"
    return collector


def filed(out, node, folder, suffix):
    path = os.path.join(str(out), node, folder)
    return sorted(n for n in os.listdir(path) if n.endswith(suffix)) if os.path.isdir(path) else []


def event_ids(names):
    """The event ids in file names ending in -event<id>.<ext>, in id order."""
    return sorted(int(n.rsplit("-event", 1)[1].split(".")[0]) for n in names)


def lines_in(path):
    return len(open(path).readlines()) if os.path.exists(path) else 0


def test_a_rise_reaches_the_analyst_with_its_spectrum_and_capture(tmp_path):
    need_matplotlib()
    out = tmp_path / "analyst"
    with Broker(str(tmp_path / "broker")) as broker:
        cfg = mqtt_config(broker, tmp_path)
        collector = start_collector(cfg, out)
        try:
            config = node_config(tmp_path)
            x = scenario(20.0, [(10.0, 2.0)])
            sink = run_node(config, cfg, x)
            assert wait_for(lambda: filed(out, "rig-1", "captures", ".wav"), 15)
        finally:
            collector.stop()
    (event,) = [e for e in sink.of("event") if e["kind"] == "band"]
    (sent,) = sink.of("spectrum")
    assert sent["id"] == event["id"]
    (notice,) = sink.of("capture")
    assert notice["id"] == event["id"] and notice["file"] == event["capture"]

    # The event, once, as published.
    lines = [json.loads(line) for line in open(out / "rig-1" / "events.jsonl")]
    assert [e["id"] for e in lines if e["kind"] == "band"] == [event["id"]]
    # The spectrum: an npz whose numbers are the monitor's own spectrum as it
    # went on the wire (4 significant digits), and a PNG.
    stem = f"rig-1-{event['time'][:4]}"
    (npz,) = filed(out, "rig-1", "spectra", ".npz")
    assert npz.startswith(stem) and npz.endswith(f"-event{event['id']}.npz")
    wire = json.loads(encode(sent))
    with np.load(out / "rig-1" / "spectra" / npz) as z:
        assert z["channels"].tolist() == ["x", "y"]
        assert np.array_equal(z["rms"], np.array([wire["channels"]["x"], wire["channels"]["y"]]))
        assert np.array_equal(z["freqs_hz"], np.arange(513) * FS / 1024)
        rms = z["rms"]
    # Against scipy.signal.welch(scaling="spectrum") over the result's samples:
    # the square root of its power per line, to the 4 digits sent.
    spec = config.spectrum
    end = int(round(sent["stream_s"] * FS)) + 1
    _, power = scipy.signal.welch(x[end - spec.span:end].T, FS, window="hann", nperseg=spec.size,
                                  noverlap=spec.size - spec.hop, detrend="constant", scaling="spectrum")
    big = np.sqrt(power) > 1e-9  # the invented signal has no noise: the rest is rounding dust
    assert rms[big] == pytest.approx(np.sqrt(power)[big], rel=5e-4)
    png = out / "rig-1" / "spectra" / npz.replace(".npz", ".png")
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # The capture: the board's file, byte for byte, named by node, time and event.
    (wav,) = filed(out, "rig-1", "captures", ".wav")
    assert wav.endswith(f"-event{event['id']}.wav")
    board = tmp_path / "captures" / event["capture"]
    assert (out / "rig-1" / "captures" / wav).read_bytes() == board.read_bytes()
    _, samples = scipy.io.wavfile.read(out / "rig-1" / "captures" / wav)  # an outside reader opens it
    assert samples.shape[1] == 2
    (record,) = [json.loads(line) for line in open(out / "rig-1" / "captures.jsonl")]
    assert record["file"] == event["capture"] and record["id"] == event["id"]


def test_a_broker_outage_loses_neither_spectra_nor_captures(tmp_path):
    out = tmp_path / "analyst"
    broker = Broker(str(tmp_path / "broker"))  # not started: the broker is away
    cfg = mqtt_config(broker, tmp_path)
    config = node_config(tmp_path)
    # Three rises, far enough apart for three captures (the test_capture scenario).
    x = scenario(60.0, [(10.0, 2.0), (15.0, 0.2), (30.0, 2.0), (35.0, 0.2), (50.0, 2.0), (55.0, 0.2)])
    first = run_node(config, cfg, x)
    rises = [e["id"] for e in first.of("event") if e["kind"] == "band" and e["previous"] == "normal"]
    assert len(rises) == 3 and len(first.of("capture")) == 3
    with broker:
        collector = start_collector(cfg, out, client_id="analyst-outage")
        try:
            # The node starts again and sends what waited on its disk.
            later = MqttSink(cfg, config.node, reconnect_min=0.1, reconnect_max=0.5)
            assert later.queued >= 3 and later.evidence_queued == 6
            later.open({"state": "online"}, {"state": "offline"})
            try:
                assert wait_for(lambda: later.evidence_queued == 0 and later.queued == 0, 20)
                assert wait_for(lambda: len(filed(out, "rig-1", "captures", ".wav")) == 3, 20)
            finally:
                later.close({"state": "offline"})
        finally:
            collector.stop()
    assert event_ids(filed(out, "rig-1", "spectra", ".npz")) == rises
    assert event_ids(filed(out, "rig-1", "captures", ".wav")) == rises
    assert later.evidence_dropped == 0


def test_the_collector_catches_up_after_being_away_and_after_a_broker_restart(tmp_path):
    out = tmp_path / "analyst"
    with Broker(str(tmp_path / "broker"), persistence=True) as broker:
        cfg = mqtt_config(broker, tmp_path)
        start_collector(cfg, out, client_id="analyst-away").stop()  # the session exists; then away
        sink = MqttSink(cfg, "pump-1", reconnect_min=0.1, reconnect_max=0.5)
        sink.open({"state": "online"}, {"state": "offline"})
        try:
            for i in range(1, 4):
                sink.send("event", {"id": i, "kind": "band"})
            assert wait_for(lambda: sink.queued == 0, 10)
            broker.restart()  # the broker saves the session and its messages
            collector = start_collector(cfg, out, client_id="analyst-away")
            try:
                assert wait_for(lambda: lines_in(out / "pump-1" / "events.jsonl") == 3, 10)
                broker.stop()
                broker.start()
                assert collector.subscribed.wait(10)
                sink.send("event", {"id": 4, "kind": "band"})
                assert wait_for(lambda: lines_in(out / "pump-1" / "events.jsonl") == 4, 15)
            finally:
                collector.stop()
        finally:
            sink.close({"state": "offline"})
    ids = [json.loads(line)["id"] for line in open(out / "pump-1" / "events.jsonl")]
    assert ids == [1, 2, 3, 4]


class PausingSource(ArraySource):
    """Replays samples, resting a moment after `at` samples, so what the
    delivery thread does meanwhile is seen by the next results."""

    def __init__(self, config, samples, at, block=300):
        super().__init__(config, samples, block=block)
        self.at = at
        self.rested = False

    def _read(self, timeout):
        if not self.rested and self._pos >= self.at:
            self.rested = True
            time.sleep(1.0)
        return super()._read(timeout)


def test_the_capture_queue_keeps_its_bound_and_says_so_without_touching_events(tmp_path):
    broker = Broker(str(tmp_path / "broker"))  # away for the whole run
    # Each capture: 6 s x 2 channels x 2048 Hz x 4 bytes = 98 kB; the bound holds two.
    cfg = mqtt_config(broker, tmp_path, capture_queue_mb=0.25)
    config = node_config(tmp_path)
    x = scenario(60.0, [(10.0, 2.0), (15.0, 0.2), (30.0, 2.0), (35.0, 0.2), (45.0, 2.0), (50.0, 0.2)])
    inner = MqttSink(cfg, config.node, reconnect_min=0.1, reconnect_max=0.5)
    sink = Keeping(inner)
    monitor = Monitor(config, PausingSource(config.source, x, at=int(52 * FS)), sink)
    monitor.run()
    assert len(sink.of("capture")) == 3
    health = [e for e in sink.of("event") if e["kind"] == "health" and e["name"] == "queue"]
    assert health and health[0]["level"] == "fault" and health[0]["value"] >= 1
    bands = [e for e in sink.of("event") if e["kind"] == "band"]
    assert inner.dropped == 0  # every event kept
    assert inner.captures.closed
    from monitor.deliver.evidence_queue import CAPTURES, EvidenceQueue

    with EvidenceQueue(cfg.queue_dir, CAPTURES, "capture", 10 ** 9) as kept:
        assert kept.count == 2 and kept.bytes <= 250_000
    with broker:
        out = tmp_path / "analyst"
        collector = start_collector(cfg, out, client_id="analyst-bound")
        later = MqttSink(cfg, config.node, reconnect_min=0.1, reconnect_max=0.5)
        later.open({"state": "online"}, {"state": "offline"})
        try:
            assert wait_for(lambda: len(filed(out, "rig-1", "captures", ".wav")) == 2, 20)
            assert wait_for(lambda: lines_in(out / "rig-1" / "events.jsonl") == len(sink.of("event")), 10)
        finally:
            later.close({"state": "offline"})
            collector.stop()
    # The newest two captures stayed; the oldest went first.
    rises = [e["id"] for e in bands if e["previous"] == "normal"]
    assert event_ids(filed(out, "rig-1", "captures", ".wav")) == rises[1:]
    ids = [json.loads(line)["id"] for line in open(out / "rig-1" / "events.jsonl")]
    assert ids == [e["id"] for e in sink.of("event")]


def publish(broker, messages):
    client = make_client("hostile-node")
    client.connect(broker.host, broker.port)
    client.loop_start()
    try:
        for topic, payload in messages:
            client.publish(topic, payload, qos=1).wait_for_publish(5)
    finally:
        client.disconnect()
        client.loop_stop()


def test_hostile_names_off_the_wire_cannot_leave_the_output_folder(tmp_path):
    wav = tmp_path / "c.wav"
    with RecordingWriter(str(wav), 1024.0, ["x"], "g") as w:
        w.write(np.zeros((64, 1)))

    def capture(node, file, event=5):
        notice = capture_notice(node, 1.0, str(wav), {"events": [{"id": event}]})
        notice["file"] = file
        return pack(notice)

    out = tmp_path / "deep" / "analyst"
    out.parent.mkdir()
    with Broker(str(tmp_path / "broker")) as broker:
        cfg = mqtt_config(broker, tmp_path)
        collector = start_collector(cfg, out, client_id="analyst-hostile")
        before = sorted(os.listdir(tmp_path))
        try:
            publish(broker, [
                (f"{PREFIX}/../event", b'{"id": 1}'),
                (f"{PREFIX}/./event", b'{"id": 1}'),
                (f"{PREFIX}/.hidden/event", b'{"id": 1}'),
                (f"{PREFIX}/..\\..\\x/capture", capture("x", "a.wav")),
                (f"{PREFIX}/{'n' * 300}/event", b'{"id": 1}'),
                (f"{PREFIX}/ok/capture", capture("ok", "../../../../etc/cron.d/x.wav")),
                (f"{PREFIX}/ok/capture", capture("ok", "/etc/passwd", event=6)),
                (f"{PREFIX}/ok/capture", capture("ok", "a.wav", event="../../x")),
                (f"{PREFIX}/ok/spectrum", json.dumps({"bin_hz": 1.0, "id": 2, "time": "../../x",
                                                      "channels": {"../../x": [1.0]}}).encode()),
                (f"{PREFIX}/ok/event", b'{"id": 7}'),
            ])
            assert wait_for(lambda: (out / "ok" / "events.jsonl").exists(), 10)
        finally:
            collector.stop()
    assert sorted(os.listdir(tmp_path)) == before  # nothing new beside the output folder
    assert os.listdir(tmp_path / "deep") == ["analyst"]
    names = sorted(os.path.relpath(os.path.join(d, f), out) for d, _, fs in os.walk(out) for f in fs)
    assert names[:1] == ["ok/captures.jsonl"] and names[-1] == "ok/events.jsonl"
    wavs = names[1:-1]
    assert len(wavs) == 2 and all(n.startswith("ok/captures/ok-") for n in wavs)
    assert [n.rsplit("event", 1)[1] for n in wavs] == ["5.wav", "6.wav"]
    assert [json.loads(line)["file"] for line in open(out / "ok" / "captures.jsonl")] == [None, None]
    assert collector.filer.counts["refused"] == 7


def test_tls_and_a_password_file_as_a_node_uses_them(tmp_path):
    certs = make_certs(tmp_path / "certs", "IP:127.0.0.1")
    acl = f"user analyst\ntopic read {PREFIX}/#\nuser pump-1\ntopic write {PREFIX}/pump-1/#\n"
    users = {"analyst": "pw-analyst", "pump-1": "pw-pump-1"}
    with Broker(str(tmp_path / "broker"), users=users, acl=acl,
                tls={"certfile": certs["certfile"], "keyfile": certs["keyfile"]}) as broker:
        for user in users:
            (tmp_path / f"{user}.pw").write_text(users[user] + "\n")
        tls = dict(tls=True, ca_file=certs["ca"])
        analyst = mqtt_config(broker, tmp_path, username="analyst", password_file=str(tmp_path / "analyst.pw"),
                              **tls)
        node = mqtt_config(broker, tmp_path, username="pump-1", password_file=str(tmp_path / "pump-1.pw"), **tls)
        out = tmp_path / "analyst"
        collector = start_collector(analyst, out, client_id="analyst-tls")
        sink = MqttSink(node, "pump-1", reconnect_min=0.1, reconnect_max=0.5)
        sink.open({"state": "online"}, {"state": "offline"})
        try:
            sink.send("event", {"id": 1, "kind": "band"})
            assert wait_for(lambda: (out / "pump-1" / "events.jsonl").exists(), 10)
        finally:
            sink.close({"state": "offline"})
            collector.stop()


def test_the_command_runs_until_sigterm_and_refuses_a_file_without_mqtt(tmp_path):
    with Broker(str(tmp_path / "broker")) as broker:
        path = tmp_path / "analyst.toml"
        path.write_text(f'[mqtt]\nhost = "127.0.0.1"\nport = {broker.port}\nprefix = "{PREFIX}"\n')
        out = tmp_path / "out"
        proc = subprocess.Popen([sys.executable, "-m", "monitor", "collect", "-c", str(path), "-o", str(out)],
                                cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        try:
            ready = threading.Event()
            lines = []

            def read():
                for line in proc.stderr:
                    lines.append(line)
                    if "connected to" in line:
                        ready.set()

            threading.Thread(target=read, daemon=True).start()
            assert ready.wait(15), "".join(lines)
            time.sleep(0.3)  # the SUBACK follows the CONNACK
            publish(broker, [(f"{PREFIX}/pump-9/event", b'{"id": 3}')])
            assert wait_for(lambda: (out / "pump-9" / "events.jsonl").exists(), 10)
            proc.send_signal(signal.SIGTERM)
            assert proc.wait(10) == 0
        finally:
            if proc.poll() is None:
                proc.kill()
        assert any("filed: event 1" in line for line in lines), "".join(lines)
    path.write_text('[node]\nname = "x"\n')
    result = subprocess.run([sys.executable, "-m", "monitor", "collect", "-c", str(path), "-o", str(out)],
                            cwd=ROOT, capture_output=True, text=True, timeout=30)
    assert result.returncode == 2
    assert "config error" in result.stderr and "mqtt" in result.stderr
