"""A fleet of nodes on one mosquitto: per-node users and an ACL that lets
each node publish only under `bandwatch/<its user name>/...`, client ids that
differ between nodes and stay the same across restarts, and consumers sharing
the event stream through a shared subscription.

Sources: MQTT 3.1.1 (OASIS 2014) section 3.1.3.1 (the client id identifies
the session; section 3.1.4: a second connection with the same id takes the
first one's place) and section 4.7 (topic filters); MQTT 5.0 (OASIS 2019)
section 4.8.2 (shared subscriptions, `$share/{group}/{filter}`: each message
goes to one subscriber of the group); the mosquitto.conf(5) and
mosquitto_passwd(1) manual pages (acl_file, `pattern` with `%u`, the user
name; use_identity_as_username).
"""

import json
import os
import re
import subprocess
import sys
import time
from dataclasses import replace

from monitor.config import MqttConfig
from monitor.deliver.mqtt import MqttSink
from mqtt_broker import Broker, Collector, make_certs, make_client_cert, wait_for

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
PREFIX = "bandwatch"
STATUS = {"state": "online", "version": "test", "since": "2024-01-01T00:00:00.000Z"}

# The ACL a fleet's broker would use (mosquitto.conf(5), acl_file): every
# node writes only under its own user name; the consumer reads everything.
ACL = f"""\
pattern write {PREFIX}/%u/#

user consumer
topic read {PREFIX}/#
"""

PASSWORDS = {"pump-1": "pw-pump-1", "pump-2": "pw-pump-2", "consumer": "pw-consumer"}


def online(node):
    return dict(STATUS, node=node)


def offline(node):
    return dict(STATUS, node=node, state="offline")


def fleet_broker(tmp_path):
    return Broker(str(tmp_path / "broker"), users=PASSWORDS, acl=ACL)


def node_config(broker, tmp_path, name, user):
    """The [mqtt] section of node `name`, logged in as `user`."""
    pw = tmp_path / f"password-{user}"
    pw.write_text(PASSWORDS[user] + "\n")
    return MqttConfig(host=broker.host, port=broker.port, prefix=PREFIX, keepalive=5, username=user,
                      password_file=str(pw), queue_dir=str(tmp_path / f"queue-{name}-as-{user}"))


def start_sink(cfg, node):
    sink = MqttSink(cfg, node, reconnect_min=0.1, reconnect_max=0.5)
    sink.open(online(node), offline(node))
    assert wait_for(lambda: sink.connected, 5), f"{node} did not connect"
    return sink


def consumer(broker, pattern):
    return Collector(broker, pattern, username="consumer", password=PASSWORDS["consumer"])


def events(collector, node):
    return [json.loads(m.payload) for m in collector.on(f"{PREFIX}/{node}/event")]


def under(collector, node):
    return [m for m in collector.messages if m.topic.startswith(f"{PREFIX}/{node}/")]


def test_a_node_publishes_only_under_its_own_name(tmp_path):
    with fleet_broker(tmp_path) as broker, consumer(broker, f"{PREFIX}/#") as sub:
        right = start_sink(node_config(broker, tmp_path, "pump-1", "pump-1"), "pump-1")
        # A copied config: node name changed, login not.
        wrong = start_sink(node_config(broker, tmp_path, "pump-2", "pump-1"), "pump-2")
        try:
            for i in range(10):
                right.send("event", {"node": "pump-1", "id": i})
            assert wait_for(lambda: len(events(sub, "pump-1")) == 10, 5)
            assert [e["id"] for e in events(sub, "pump-1")] == list(range(10))

            for i in range(10):
                wrong.send("event", {"node": "pump-2", "id": i})
            # MQTT 3.1.1 PUBACK carries no reason code: the broker acknowledges
            # the refused publishes like any other, and they leave the queue.
            assert wait_for(lambda: wrong.queued == 0 and wrong.published == 10, 5)
            # Positive control, sent after the refused ones were acknowledged:
            # once it has arrived, anything allowed would have arrived too.
            right.send("event", {"node": "pump-1", "id": 10})
            assert wait_for(lambda: len(events(sub, "pump-1")) == 11, 5)
            assert not under(sub, "pump-2")  # neither its events nor its retained status
        finally:
            right.close(offline("pump-1"))
            wrong.close(offline("pump-2"))


def test_node_certificates_name_the_node(tmp_path):
    # use_identity_as_username: the certificate's CN is the user the ACL
    # sees, so the node's identity is its key, not a password file.
    certs = make_certs(tmp_path / "ca", "DNS:localhost,IP:127.0.0.1")
    pump1 = make_client_cert(tmp_path / "ca", "pump-1")
    reader = make_client_cert(tmp_path / "ca", "consumer")
    server = {"certfile": certs["certfile"], "keyfile": certs["keyfile"], "cafile": certs["ca"]}
    with Broker(str(tmp_path / "broker"), tls=server, identity_as_username=True, acl=ACL) as broker:
        base = MqttConfig(host="127.0.0.1", port=broker.port, prefix=PREFIX, keepalive=5, tls=True,
                          ca_file=certs["ca"], cert_file=pump1["certfile"], key_file=pump1["keyfile"])
        with Collector(broker, f"{PREFIX}/#", tls={"ca": certs["ca"], **reader}) as sub:
            right = start_sink(replace(base, queue_dir=str(tmp_path / "q1")), "pump-1")
            wrong = start_sink(replace(base, queue_dir=str(tmp_path / "q2")), "pump-2")
            try:
                wrong.send("event", {"node": "pump-2", "id": 0})
                assert wait_for(lambda: wrong.queued == 0, 5)
                right.send("event", {"node": "pump-1", "id": 0})  # positive control
                assert wait_for(lambda: events(sub, "pump-1"), 5)
                assert not under(sub, "pump-2")
            finally:
                right.close(offline("pump-1"))
                wrong.close(offline("pump-2"))


CHILD = r"""
import json, sys, time
from monitor.config import MqttConfig
from monitor.deliver.mqtt import MqttSink
args = json.loads(sys.argv[1])
sink = MqttSink(MqttConfig(**args["cfg"]), args["node"], reconnect_min=0.1, reconnect_max=0.5)
sink.open({"state": "online"}, {"state": "offline"})
deadline = time.monotonic() + 10
while not sink.connected and time.monotonic() < deadline:
    time.sleep(0.01)
sink.close({"state": "offline"})
print(sink.connected or time.monotonic() < deadline)
"""


def run_node_process(cfg, node):
    """One start and stop of a node's sink in a process of its own."""
    env = dict(os.environ, PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""))
    done = subprocess.run([sys.executable, "-c", CHILD, json.dumps({"cfg": cfg.__dict__, "node": node})],
                          env=env, capture_output=True, text=True, timeout=30)
    assert done.returncode == 0 and done.stdout.strip() == "True", done.stderr


def connections(broker):
    """(client id, user) of every connection the broker accepted, from its log."""
    return re.findall(r"New client connected from \S+ as (\S+) \(.*u'([^']*)'\)", broker.log())


def test_client_ids_differ_between_nodes_and_survive_restarts(tmp_path):
    with fleet_broker(tmp_path) as broker:
        cfg1 = node_config(broker, tmp_path, "pump-1", "pump-1")
        cfg2 = node_config(broker, tmp_path, "pump-2", "pump-2")
        one = start_sink(cfg1, "pump-1")
        two = start_sink(cfg2, "pump-2")
        try:
            # MQTT 3.1.1 section 3.1.4: a second connection under the same id
            # would push the first one off; both stay on.
            time.sleep(0.3)
            assert one.connected and two.connected
        finally:
            one.close(offline("pump-1"))
            two.close(offline("pump-2"))
        # Two restarts of pump-1, each a new process.
        run_node_process(cfg1, "pump-1")
        run_node_process(cfg1, "pump-1")
        seen = wait_for(lambda: connections(broker) if len(connections(broker)) >= 4 else None, 5)
        ids1 = [cid for cid, user in seen if user == "pump-1"]
        ids2 = [cid for cid, user in seen if user == "pump-2"]
        assert len(ids1) == 3 and len(set(ids1)) == 1, seen  # the same id at every start
        assert len(ids2) == 1 and ids2[0] != ids1[0], seen


def test_a_shared_subscription_hands_each_event_to_one_consumer(tmp_path):
    # mosquitto offers $share (MQTT 5.0 section 4.8.2) to 3.1.1 clients as well.
    shared = f"$share/alerts/{PREFIX}/+/event"
    with fleet_broker(tmp_path) as broker:
        with consumer(broker, shared) as a, consumer(broker, shared) as b, \
                consumer(broker, f"{PREFIX}/+/event") as everything:
            sinks = [start_sink(node_config(broker, tmp_path, n, n), n) for n in ("pump-1", "pump-2")]
            try:
                for i in range(20):
                    for sink in sinks:
                        sink.send("event", {"node": sink.node, "id": i})
                want = {(n, i) for n in ("pump-1", "pump-2") for i in range(20)}

                def keys(collector):
                    return [(json.loads(m.payload)["node"], json.loads(m.payload)["id"]) for m in collector.messages]

                assert wait_for(lambda: set(keys(a)) | set(keys(b)) == want, 10)
                assert wait_for(lambda: all(s.queued == 0 for s in sinks), 5)
                # The plain subscriber is the control: it gets every event.
                assert wait_for(lambda: set(keys(everything)) == want, 5)
                got = keys(a) + keys(b)
                assert sorted(got) == sorted(want)  # each exactly once, in one of the two
                assert keys(a) and keys(b)  # and the work is shared
            finally:
                for sink in sinks:
                    sink.close(offline(sink.node))
