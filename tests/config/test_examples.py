"""The shipped example configs load, and their severity limits are ISO values."""

import glob
import os

import pytest

from monitor.config import load

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
EXAMPLES = sorted(glob.glob(os.path.join(ROOT, "config", "*.toml")))

# ISO 10816-3:2009 Annex A zone boundaries, mm/s RMS 10-1000 Hz, as given in
# check-values.md (from memory there): B/C and C/D per group and support.
ISO_10816_3 = {
    ("group 1", "rigid"): (4.5, 7.1),
    ("group 1", "flexible"): (7.1, 11.0),
    ("group 2", "rigid"): (2.8, 4.5),
    ("group 2", "flexible"): (4.5, 7.1),
}


def test_there_is_an_example_for_every_source_kind():
    kinds = {load(p).source.kind for p in EXAMPLES}
    assert kinds == {"serial", "tcp-client", "tcp-server", "udp", "file", "simulator"}


@pytest.mark.parametrize("path", EXAMPLES, ids=os.path.basename)
def test_example_loads(path):
    assert load(path).node


WITH_OVERALL = [p for p in EXAMPLES if any(b.name == "overall" for b in load(p).bands)]


def test_most_examples_have_an_overall_band():
    assert len(WITH_OVERALL) >= 5


@pytest.mark.parametrize("path", WITH_OVERALL, ids=os.path.basename)
def test_overall_velocity_limits_are_iso_zone_boundaries(path):
    band = [b for b in load(path).bands if b.name == "overall"][0]
    assert band.hz == (10.0, 1000.0) and band.quantity == "velocity"
    with open(path, encoding="utf-8") as fh:
        text = fh.read()
    group = "group 1" if "group 1" in text else "group 2"
    support = "flexible" if "flexible" in text else "rigid"
    assert (band.warning, band.alarm) == ISO_10816_3[(group, support)]


@pytest.mark.parametrize("preset", sorted(ISO_10816_3))
def test_severity_preset_gives_the_iso_zone_band(preset):
    from monitor.config import parse

    group, support = preset
    name = f"{group.replace(' ', '')}-{support}"
    text = f"""
[node]
name = "n"
[source]
kind = "simulator"
sample_rate = 5120.0
channels = ["x"]
[speed]
rpm = {{rpm}}
[[band]]
name = "overall"
severity = "{name}"
"""
    # ISO 10816-3 (check-values.md): 10-1000 Hz above 600 r/min, 2-1000 Hz for 120-600 r/min.
    fast = parse(text.format(rpm=1480.0)).bands[0]
    slow = parse(text.format(rpm=450.0)).bands[0]
    assert fast.hz == (10.0, 1000.0) and slow.hz == (2.0, 1000.0)
    assert fast.quantity == "velocity"
    assert (fast.warning, fast.alarm) == ISO_10816_3[preset]
