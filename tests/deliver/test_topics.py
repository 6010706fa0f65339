"""Topic prefix rules, held against a real mosquitto: every prefix `check`
refuses is one the broker refuses or silently drops, and prefixes at the
edges of what it accepts deliver.

MQTT 3.1.1 (OASIS 2014) section 1.5.3 (UTF-8 strings: no control characters
or noncharacters), 4.7.1 (wildcards), 4.7.2 (topics starting with $).
"""

import json

import pytest

from monitor.config import MqttConfig
from monitor.deliver.mqtt import MqttSink
from monitor.deliver.topics import MAX_BYTES, MAX_LEVELS, prefix_problem
from mqtt_broker import Broker, Collector, wait_for

NODE = "pump-2"
ONLINE = {"node": NODE, "state": "online", "version": "test", "since": "2024-01-01T00:00:00.000Z"}

EDGES = [
    "/".join(["a"] * MAX_LEVELS),  # the most levels allowed
    "\u00e9" * (MAX_BYTES // 2),  # the most bytes allowed, two per character
    "f\u00e1brica/hall-3",
]


@pytest.mark.parametrize("prefix, problem", [
    ("", "empty"),
    ("$SYS/bandwatch", "starts with $"),
    ("$share/alerts/bandwatch", "starts with $"),
    ("band+watch", "wildcard +"),
    ("plant/#", "wildcard #"),
    ("band\nwatch", "U+000A"),
    ("band\x00watch", "U+0000"),
    ("band\x85watch", "U+0085"),
    ("band\ufdd0watch", "U+FDD0"),
    ("band\U0001fffewatch", "U+1FFFE"),
    ("/bandwatch", "empty level"),
    ("plant//hall", "empty level"),
    ("bandwatch/", "empty level"),
    ("/".join(["a"] * (MAX_LEVELS + 1)), "65 levels"),
    ("\u00e9" * (MAX_BYTES // 2) + "x", "257 bytes"),
])
def test_refused_prefixes_name_the_problem(prefix, problem):
    assert problem in prefix_problem(prefix)


@pytest.mark.parametrize("prefix", ["bandwatch", "plant/hall-3", "a b", "x$y"] + EDGES)
def test_accepted_prefixes(prefix):
    assert prefix_problem(prefix) is None


def sink_for(broker, tmp_path, prefix):
    cfg = MqttConfig(host=broker.host, port=broker.port, prefix=prefix, keepalive=5,
                     queue_dir=str(tmp_path / "queue" / str(abs(hash(prefix)))))
    sink = MqttSink(cfg, NODE, reconnect_min=0.1, reconnect_max=0.5)
    sink.open(ONLINE, dict(ONLINE, state="offline"))
    return sink


@pytest.fixture
def broker(tmp_path):
    with Broker(str(tmp_path / "broker")) as running:
        yield running


@pytest.mark.parametrize("prefix", ["$SYS/bandwatch", "$share/alerts/bandwatch"])
def test_the_broker_acknowledges_and_drops_dollar_topics(broker, tmp_path, prefix):
    assert prefix_problem(prefix)
    with Collector(broker, "#") as everything, Collector(broker, "$SYS/bandwatch/#") as sys_topics:
        sink = sink_for(broker, tmp_path, prefix)
        try:
            sink.send("event", {"id": 1})
            assert wait_for(lambda: sink.published == 1, 5)  # confirmed by the broker...
        finally:
            sink.close(dict(ONLINE, state="offline"))
        assert not [m for m in everything.messages + sys_topics.messages if "bandwatch" in m.topic]  # ...and gone


@pytest.mark.parametrize("prefix", ["band\nwatch", "band\x7fwatch", "band\uffffwatch", "band\ufdd0watch"])
def test_the_broker_refuses_a_node_with_control_characters_or_noncharacters(broker, tmp_path, prefix):
    assert prefix_problem(prefix)
    sink = sink_for(broker, tmp_path, prefix)  # the status will carries the prefix
    try:
        assert not wait_for(lambda: sink.connected, 2.0)
    finally:
        sink.close(dict(ONLINE, state="offline"))


@pytest.mark.parametrize("prefix", EDGES)
def test_prefixes_at_the_edges_deliver(broker, tmp_path, prefix):
    topic = f"{prefix}/{NODE}/event"
    with Collector(broker, topic) as sub:
        sink = sink_for(broker, tmp_path, prefix)
        try:
            sink.send("event", {"id": 7})
            assert wait_for(lambda: sub.on(topic), 5)
        finally:
            sink.close(dict(ONLINE, state="offline"))
    assert json.loads(sub.on(topic)[0].payload)["id"] == 7
