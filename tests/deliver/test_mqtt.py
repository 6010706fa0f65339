"""MqttSink against a real mosquitto on loopback: status and will, ordered
at-least-once events through outages and SIGKILL, the queue bound, summaries,
levels, authentication, TLS and client certificates."""

import json
import logging
import os
import queue
import signal
import subprocess
import sys
import threading
import time
from dataclasses import replace

import pytest

from conftest import need_program
from monitor.config import MqttConfig
from monitor.deliver.mqtt import MqttSink
from monitor.deliver.mqtt_client import client_id, read_password
from monitor.errors import DeliveryError
from mqtt_broker import Broker, Collector, broker_fixture, free_port, make_certs, make_client_cert, wait_for

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
NODE = "pump-2"
PREFIX = "bwtest"
ONLINE = {"node": NODE, "state": "online", "version": "test", "since": "2024-01-01T00:00:00.000Z"}
OFFLINE = {"node": NODE, "state": "offline", "version": "test", "since": "2024-01-01T00:00:00.000Z"}

broker = pytest.fixture(broker_fixture())


def topic(suffix):
    return f"{PREFIX}/{NODE}/{suffix}"


def config(broker, tmp_path, **kw):
    base = MqttConfig(
        host=broker.host, port=broker.port, prefix=PREFIX, keepalive=5, queue_dir=str(tmp_path / "queue")
    )
    return replace(base, **kw)


def make_sink(cfg, node=NODE):
    # Short reconnect backoff keeps the outage tests quick.
    return MqttSink(cfg, node, reconnect_min=0.1, reconnect_max=0.5)


def ids(messages):
    return [json.loads(m.payload)["id"] for m in messages]


def first_seen(values):
    """The ids in order of first arrival: QoS 1 may repeat, consumers de-duplicate."""
    seen, out = set(), []
    for v in values:
        if v not in seen:
            seen.add(v)
            out.append(v)
    return out


CHILD = r"""
import json, logging, sys, time
args = json.loads(sys.argv[1])
logging.basicConfig(level=logging.INFO, stream=sys.stderr)
from monitor.config import MqttConfig
from monitor.deliver.mqtt import MqttSink
sink = MqttSink(MqttConfig(**args["cfg"]), args["node"], reconnect_min=0.1, reconnect_max=0.5)
sink.open(args["online"], args["offline"])
if args["wait_connected"]:
    deadline = time.monotonic() + 10
    while not sink.connected and time.monotonic() < deadline:
        time.sleep(0.01)
    print("connected", sink.connected, flush=True)
if args["wait_go"]:
    sys.stdin.readline()
for i in range(args["events"]):
    sink.send("event", {"id": i})
print("sent", sink.queued, flush=True)
while True:
    time.sleep(1)
"""


class Child:
    """A sink in its own process, to be killed with SIGKILL."""

    def __init__(self, cfg, events=0, wait_connected=True, wait_go=False):
        args = {
            "cfg": cfg.__dict__,
            "node": NODE,
            "online": ONLINE,
            "offline": OFFLINE,
            "events": events,
            "wait_connected": wait_connected,
            "wait_go": wait_go,
        }
        env = dict(os.environ, PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""))
        self.process = subprocess.Popen(
            [sys.executable, "-c", CHILD, json.dumps(args)],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            env=env,
            text=True,
        )
        self.lines = queue.Queue()
        threading.Thread(target=self._read, daemon=True).start()

    def _read(self):
        for line in self.process.stdout:
            self.lines.put(line.split())

    def expect(self, word, timeout=10.0):
        try:
            line = self.lines.get(timeout=timeout)
        except queue.Empty:
            self.kill()
            raise AssertionError(f"child said nothing; stderr:\n{self.process.stderr.read()}")
        assert line[0] == word, line
        return line

    def go(self):
        self.process.stdin.write("go\n")
        self.process.stdin.flush()

    def kill(self):
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGKILL)
        self.process.wait(10)
        self.process.stdin.close()
        self.process.stdout.close()
        self.process.stderr.close()


def test_client_id_is_stable_and_distinct():
    assert client_id("plant", "pump-2") == client_id("plant", "pump-2")
    assert client_id("plant", "pump-2") != client_id("plant", "pump-3")
    assert client_id("plant", "pump-2") != client_id("other", "pump-2")
    assert "pump-2" in client_id("plant", "pump-2")


def test_password_file_strips_one_newline(tmp_path):
    p = tmp_path / "pw"
    p.write_text("s3cret\n\n")
    assert read_password(str(p)) == "s3cret\n"
    p.write_text("s3cret\r\n")
    assert read_password(str(p)) == "s3cret"
    p.write_text("s3cret")
    assert read_password(str(p)) == "s3cret"
    missing = str(tmp_path / "nope")
    with pytest.raises(DeliveryError) as err:
        MqttSink(MqttConfig(username="u", password_file=missing, queue_dir=str(tmp_path / "q")), NODE)
    assert missing in str(err.value)


def test_retained_online_then_will_on_sigkill(broker, tmp_path):
    cfg = config(broker, tmp_path, keepalive=5)
    with Collector(broker, topic("status")) as live:
        child = Child(cfg)
        try:
            assert child.expect("connected")[1] == "True"
            assert wait_for(lambda: live.on(topic("status")), 5)
            # A subscriber arriving later still learns the node is online.
            # MQTT 3.1.1 section 3.3.1.3: retained messages go to new subscribers.
            with Collector(broker, topic("status")) as late:
                got = wait_for(lambda: late.on(topic("status")), 5)
                assert got and got[0].retain and json.loads(got[0].payload) == ONLINE
                assert got[0].qos == 1
        except BaseException:
            child.kill()
            raise
        killed_at = time.monotonic()
        child.kill()
        # MQTT 3.1.1 section 3.1.2.5: the will goes out when the connection
        # closes without DISCONNECT; at the latest after 1.5 x keepalive
        # (section 3.1.2.10).
        offline = wait_for(
            lambda: [m for m in live.on(topic("status")) if json.loads(m.payload)["state"] == "offline"],
            1.5 * cfg.keepalive,
        )
        assert offline, "the will did not turn status offline"
        assert time.monotonic() - killed_at <= 1.5 * cfg.keepalive
        assert json.loads(offline[0].payload) == OFFLINE
    with Collector(broker, topic("status")) as late:
        got = wait_for(lambda: late.on(topic("status")), 5)
        assert got[0].retain and json.loads(got[0].payload)["state"] == "offline"


def test_clean_close_publishes_offline_and_delivers_last_events(broker, tmp_path):
    with Collector(broker, f"{PREFIX}/#") as sub:
        sink = make_sink(config(broker, tmp_path))
        sink.open(ONLINE, OFFLINE)
        assert wait_for(lambda: sink.connected, 5)
        for i in range(30):
            sink.send("event", {"id": i})
        started = time.monotonic()
        sink.close(OFFLINE)
        assert time.monotonic() - started < 4.0  # bounded wait
        assert not sink.connected
        assert wait_for(lambda: len(sub.on(topic("event"))) >= 30, 5)
        assert first_seen(ids(sub.on(topic("event")))) == list(range(30))
        states = wait_for(lambda: [json.loads(m.payload)["state"] for m in sub.on(topic("status"))][-1:] == ["offline"], 5)
        assert states
    with Collector(broker, topic("status")) as late:
        got = wait_for(lambda: late.on(topic("status")), 5)
        assert got[0].retain and json.loads(got[0].payload) == OFFLINE
    # Everything was confirmed, so the next start has nothing left over.
    sink2 = make_sink(config(broker, tmp_path))
    assert sink2.queued == 0
    sink2.close(OFFLINE)


def test_events_arrive_in_order_with_qos1(broker, tmp_path):
    with Collector(broker, topic("event"), qos=2) as sub:
        sink = make_sink(config(broker, tmp_path, qos=1))
        sink.open(ONLINE, OFFLINE)
        try:
            for i in range(200):
                sink.send("event", {"id": i})
            assert wait_for(lambda: len(sub.on(topic("event"))) >= 200, 10)
            got = sub.on(topic("event"))
            assert ids(got) == list(range(200))  # no outage: no repeats either
            # Delivered QoS is min(published, subscribed) (MQTT 3.1.1 section 3.8.4).
            assert {m.qos for m in got} == {1}
            assert not any(m.retain for m in got)
            assert wait_for(lambda: sink.published == 200 and sink.queued == 0, 5)
            assert sink.dropped == 0
        finally:
            sink.close(OFFLINE)


def test_broker_outage_while_sending_loses_nothing(tmp_path):
    # Persistence and a persistent subscriber session: the broker keeps what
    # it acknowledged for the subscriber across its own restart.
    with Broker(str(tmp_path / "broker"), persistence=True) as broker:
        with Collector(broker, topic("event"), session=True) as sub:
            sink = make_sink(config(broker, tmp_path))
            sink.open(ONLINE, OFFLINE)
            try:
                assert wait_for(lambda: sink.connected, 5)
                slowest = 0.0
                for i in range(60):
                    if i == 10:
                        broker.stop()  # mid-stream, some events in flight
                    t0 = time.monotonic()
                    sink.send("event", {"id": i})
                    slowest = max(slowest, time.monotonic() - t0)
                assert slowest < 0.5, "send() blocked while the broker was away"
                assert wait_for(lambda: not sink.connected, 5)
                assert sink.queued >= 50
                broker.start()  # same port
                want = list(range(60))
                assert wait_for(lambda: set(ids(sub.on(topic("event")))) >= set(want), 15), ids(
                    sub.on(topic("event"))
                )
                assert first_seen(ids(sub.on(topic("event")))) == want
                assert wait_for(lambda: sink.queued == 0, 5)
                assert sink.dropped == 0
            finally:
                sink.close(OFFLINE)


def test_sigkill_with_unconfirmed_events_then_restart_delivers_them(tmp_path):
    broker = Broker(str(tmp_path / "broker"))  # not started: the broker is down
    cfg = config(broker, tmp_path)
    child = Child(cfg, events=25, wait_connected=False)
    try:
        line = child.expect("sent")
        assert line[1] == "25"
    finally:
        child.kill()
    with broker:
        with Collector(broker, topic("event")) as sub:
            sink = make_sink(cfg)
            assert sink.queued == 25  # read back from the killed process's queue
            sink.open(ONLINE, OFFLINE)
            try:
                sink.send("event", {"id": 25})  # a new event goes after the backlog
                assert wait_for(lambda: len(set(ids(sub.on(topic("event"))))) == 26, 10)
                assert first_seen(ids(sub.on(topic("event")))) == list(range(26))
                assert wait_for(lambda: sink.queued == 0, 5)
            finally:
                sink.close(OFFLINE)


def test_events_on_the_wire_but_unconfirmed_survive_a_crash(tmp_path):
    # The broker is frozen (SIGSTOP): events leave the sink but no PUBACK
    # comes back. Then both crash. Only the disk queue still has the events.
    broker = Broker(str(tmp_path / "broker")).start()
    cfg = config(broker, tmp_path)
    child = Child(cfg, events=25, wait_go=True)
    try:
        assert child.expect("connected")[1] == "True"
        broker.pause()
        child.go()
        child.expect("sent")
        time.sleep(0.3)  # let the sink write to the socket
    finally:
        child.kill()
        broker.kill()
    with broker:
        with Collector(broker, topic("event")) as sub:
            sink = make_sink(cfg)
            assert sink.queued == 25
            sink.open(ONLINE, OFFLINE)
            try:
                assert wait_for(lambda: len(set(ids(sub.on(topic("event"))))) == 25, 10)
                assert first_seen(ids(sub.on(topic("event")))) == list(range(25))
                assert wait_for(lambda: sink.queued == 0, 5)
            finally:
                sink.close(OFFLINE)


def test_queue_overflow_drops_oldest_and_counts_exactly(tmp_path):
    broker = Broker(str(tmp_path / "broker"))
    sink = make_sink(config(broker, tmp_path, queue_limit=5))
    sink.open(ONLINE, OFFLINE)
    try:
        for i in range(12):
            sink.send("event", {"id": i})
        assert sink.dropped == 7
        assert sink.queued == 5
        with broker:
            with Collector(broker, topic("event")) as sub:
                assert wait_for(lambda: sink.queued == 0, 10)
                assert wait_for(lambda: len(sub.on(topic("event"))) >= 5, 5)
                assert first_seen(ids(sub.on(topic("event")))) == [7, 8, 9, 10, 11]
                assert sink.dropped == 7
    finally:
        sink.close(OFFLINE)


def test_summaries_dropped_while_disconnected_and_never_block(tmp_path):
    broker = Broker(str(tmp_path / "broker"))
    sink = make_sink(config(broker, tmp_path))
    t0 = time.monotonic()
    sink.open(ONLINE, OFFLINE)
    try:
        for i in range(500):
            sink.send("summary", {"n": i})
        assert time.monotonic() - t0 < 1.0
        assert sink.summaries_dropped == 500
        assert sink.queued == 0  # summaries never touch the disk queue
        with broker:
            with Collector(broker, topic("summary"), qos=1) as sub:
                assert wait_for(lambda: sink.connected, 5)
                sink.send("summary", {"n": 1000})
                got = wait_for(lambda: sub.on(topic("summary")), 5)
                time.sleep(0.2)  # room for any stale summary to show up
                got = sub.on(topic("summary"))
                assert [json.loads(m.payload)["n"] for m in got] == [1000]
                assert got[0].qos == 0 and not got[0].retain
    finally:
        sink.close(OFFLINE)


def test_latest_levels_published_retained_on_connect(tmp_path):
    broker = Broker(str(tmp_path / "broker"))
    sink = make_sink(config(broker, tmp_path))
    sink.open(ONLINE, OFFLINE)
    try:
        sink.send("levels", {"levels": "first"})
        sink.send("levels", {"levels": "latest"})
        assert sink.queued == 0  # levels are not stored on disk
        with broker:
            assert wait_for(lambda: sink.connected, 5)
            with Collector(broker, topic("levels")) as sub:
                got = wait_for(lambda: sub.on(topic("levels")), 5)
                assert [json.loads(m.payload)["levels"] for m in got] == ["latest"]
                assert got[0].retain and got[0].qos == 1
    finally:
        sink.close(OFFLINE)


def test_open_and_close_return_at_once_without_a_broker(tmp_path):
    port = free_port()
    cfg = MqttConfig(host="127.0.0.1", port=port, prefix=PREFIX, queue_dir=str(tmp_path / "q"))
    sink = make_sink(cfg)
    t0 = time.monotonic()
    sink.open(ONLINE, OFFLINE)
    sink.send("event", {"id": 0})
    assert time.monotonic() - t0 < 0.5
    time.sleep(0.3)  # a few failed attempts
    assert not sink.connected
    t0 = time.monotonic()
    sink.close(OFFLINE)
    assert time.monotonic() - t0 < 2.0
    assert sink.queued == 1  # kept for the next start


def test_callbacks_swallow_exceptions(tmp_path, caplog):
    sink = make_sink(MqttConfig(queue_dir=str(tmp_path / "q")))
    try:
        with caplog.at_level(logging.ERROR, logger="bandwatch.delivery"):
            sink._on_connect(None)  # wrong arity: must be logged, not raised into paho
            sink._on_publish()
        assert "callback" in caplog.text
    finally:
        sink.close(OFFLINE)


def test_username_and_password_file(tmp_path, caplog):
    secret = "pa55-word-not-in-logs"
    with Broker(str(tmp_path / "broker"), users={"node1": secret}) as broker:
        pw = tmp_path / "password"
        pw.write_text(secret + "\n")  # as `echo pw > file` writes it
        with caplog.at_level(logging.DEBUG, logger="bandwatch.delivery"):
            good = make_sink(config(broker, tmp_path / "a", username="node1", password_file=str(pw)))
            good.open(ONLINE, OFFLINE)
            try:
                assert wait_for(lambda: good.connected, 5)
            finally:
                good.close(OFFLINE)
            wrong = tmp_path / "wrong"
            wrong.write_text("guess\n")
            bad = make_sink(config(broker, tmp_path / "b", username="node1", password_file=str(wrong)))
            bad.open(ONLINE, OFFLINE)
            try:
                assert wait_for(lambda: "refused" in caplog.text, 5)
                assert not bad.connected
            finally:
                bad.close(OFFLINE)
        assert secret not in caplog.text and "guess" not in caplog.text


def test_tls_checks_the_ca_and_the_host_name(tmp_path, caplog):
    good = make_certs(tmp_path / "good", "DNS:localhost,IP:127.0.0.1")
    other = make_certs(tmp_path / "other", "DNS:localhost,IP:127.0.0.1")
    misnamed = make_certs(tmp_path / "misnamed", "DNS:broker.invalid")

    def try_connect(certs, ca, name):
        with Broker(str(tmp_path / f"broker-{name}"), tls=certs) as broker:
            cfg = replace(config(broker, tmp_path / name, tls=True, ca_file=ca), host="127.0.0.1")
            sink = make_sink(cfg)
            sink.open(ONLINE, OFFLINE)
            try:
                return wait_for(lambda: sink.connected, 3.0 if name == "ok" else 1.5)
            finally:
                sink.close(OFFLINE)

    assert try_connect(good, good["ca"], "ok")
    assert not try_connect(good, other["ca"], "untrusted")  # signed by a CA we do not trust
    assert not try_connect(misnamed, misnamed["ca"], "misnamed")  # RFC 6125: name must match
    assert "certificate verify failed" in caplog.text  # the log says why
    missing = str(tmp_path / "no-such-ca.pem")
    with pytest.raises(DeliveryError) as err:
        MqttSink(MqttConfig(tls=True, ca_file=missing, queue_dir=str(tmp_path / "q")), NODE)
    assert missing in str(err.value)


def test_bad_client_certificate_files_are_named(tmp_path):
    certs = make_certs(tmp_path / "ca", "DNS:localhost,IP:127.0.0.1")
    client = make_client_cert(tmp_path / "ca", "pump-2")
    junk = tmp_path / "junk.pem"
    junk.write_text("not a certificate\n")
    locked = tmp_path / "locked"
    # OpenSSL's own format for a key under a pass phrase (PKCS#8, encrypted).
    subprocess.run([need_program("openssl"), "pkcs8", "-topk8", "-in", client["keyfile"], "-out", str(locked),
                    "-passout", "pass:secret"], check=True, capture_output=True)
    cases = [
        ({"cert_file": str(tmp_path / "missing.pem")}, "cert_file", str(tmp_path / "missing.pem")),
        ({"cert_file": client["certfile"], "key_file": str(tmp_path / "missing.key")}, "key_file",
         str(tmp_path / "missing.key")),
        ({"cert_file": str(junk), "key_file": client["keyfile"]}, "cert_file", str(junk)),
        # A key from another pair: OpenSSL refuses the mismatch (KEY_VALUES_MISMATCH).
        ({"cert_file": client["certfile"], "key_file": certs["keyfile"]}, "key_file", certs["keyfile"]),
        ({"cert_file": client["certfile"], "key_file": str(locked)}, "encrypted", str(locked)),
    ]
    for i, (files, word, path) in enumerate(cases):
        cfg = MqttConfig(tls=True, ca_file=certs["ca"], queue_dir=str(tmp_path / f"q{i}"), **files)
        with pytest.raises(DeliveryError) as err:
            MqttSink(cfg, NODE)
        assert word in str(err.value) and repr(path) in str(err.value), str(err.value)
    # The queue directory is released again after each refusal.
    sink = MqttSink(MqttConfig(tls=True, ca_file=certs["ca"], queue_dir=str(tmp_path / "q0"),
                               cert_file=client["certfile"], key_file=client["keyfile"]), NODE)
    sink.close(OFFLINE)


def test_broker_requiring_a_client_certificate(tmp_path, caplog):
    certs = make_certs(tmp_path / "ca", "DNS:localhost,IP:127.0.0.1")
    node = make_client_cert(tmp_path / "ca", "pump-2")
    reader = make_client_cert(tmp_path / "ca", "reader")
    server = {"certfile": certs["certfile"], "keyfile": certs["keyfile"], "cafile": certs["ca"]}
    with Broker(str(tmp_path / "broker"), tls=server, require_certificate=True) as broker:
        base = replace(config(broker, tmp_path, tls=True, ca_file=certs["ca"]), host="127.0.0.1")
        with Collector(broker, topic("event"), tls={"ca": certs["ca"], **reader}) as sub:
            # Without a certificate: refused, retried with backoff, events kept.
            bare = MqttSink(base, NODE, reconnect_min=0.2, reconnect_max=0.4)

            def refusals():
                return [r for r in caplog.records if "closed the connection before accepting it" in r.getMessage()]

            with caplog.at_level(logging.DEBUG, logger="bandwatch.delivery"):
                bare.open(ONLINE, OFFLINE)
                slowest = 0.0
                for i in range(20):
                    t0 = time.monotonic()
                    bare.send("event", {"id": i})
                    slowest = max(slowest, time.monotonic() - t0)
                assert wait_for(lambda: len(refusals()) >= 5, 5)  # it keeps trying
                assert not bare.connected
                bare.close(OFFLINE)
            assert slowest < 0.5, "send() blocked while the broker refused the connection"
            assert bare.queued == 20
            # RFC 8446 section 4.4.2 and 6.2: a TLS 1.3 server that needs a
            # client certificate ends the handshake with "certificate_required".
            assert "certificate required" in caplog.text
            refused = refusals()
            assert refused[0].levelno == logging.WARNING  # said once, loudly
            assert all(r.levelno == logging.DEBUG for r in refused[1:])  # then quietly
            times = [r.created for r in refused]
            gaps = [b - a for a, b in zip(times, times[1:])]
            # Backoff: never faster than reconnect_min, and growing to reconnect_max.
            assert min(gaps) >= 0.15 and max(gaps) >= 0.35, gaps
            assert "peer did not return a certificate" in broker.log()  # the broker's side of it
            assert not sub.on(topic("event"))

            # With a certificate from the broker's CA: accepted, and the kept events go out in order.
            good = make_sink(replace(base, cert_file=node["certfile"], key_file=node["keyfile"]))
            assert good.queued == 20
            good.open(ONLINE, OFFLINE)
            try:
                assert wait_for(lambda: len(set(ids(sub.on(topic("event"))))) == 20, 10)
                assert first_seen(ids(sub.on(topic("event")))) == list(range(20))
                assert wait_for(lambda: good.queued == 0, 5)
            finally:
                good.close(OFFLINE)
