"""The shipped example configs load, and their severity limits are ISO values."""

import glob
import os
import sys

import pytest

from monitor.config import load

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - old Pythons only
    import tomli as tomllib

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
EXAMPLES = sorted(glob.glob(os.path.join(ROOT, "config", "*.toml")))

# ISO 10816-3:2009, Annex A, Table A.1 (carried into ISO 20816-3:2022): zone
# boundaries in mm/s RMS, 10-1000 Hz, B/C and C/D per group and support.
# Written from memory of the standard, not read off a copy.
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
def test_example_loads_as_written(path):
    # The file read by a plain TOML parser (tomllib, or tomli before 3.11)
    # against what the loader made of it: nothing dropped or renamed. Each
    # example is named after its source kind; the demo is the simulator.
    with open(path, "rb") as fh:
        raw = tomllib.load(fh)
    config = load(path)
    assert config.node == raw["node"]["name"]
    assert config.source.kind == raw["source"]["kind"]
    stem = os.path.basename(path)[: -len(".toml")]
    assert config.source.kind == ("simulator" if stem == "demo" else stem)
    assert list(config.source.channels) == raw["source"]["channels"]
    assert [b.name for b in config.bands] == [b["name"] for b in raw.get("band", [])]
    assert config.spectrum.window == raw["spectrum"].get("window", "hann")


WITH_OVERALL = [p for p in EXAMPLES if any(b.name == "overall" for b in load(p).bands)]


def test_every_live_example_has_an_overall_band():
    # This project's choice: every example for a live sensor watches ISO
    # broadband velocity; the file example replays a recording of unknown rate.
    live = {os.path.basename(p) for p in EXAMPLES} - {"file.toml"}
    assert {os.path.basename(p) for p in WITH_OVERALL} == live


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
    # ISO 10816-3:2009, its clause on measuring equipment (the broadband
    # frequency range), from memory: 10-1000 Hz above 600 r/min, 2-1000 Hz
    # for 120-600 r/min.
    fast = parse(text.format(rpm=1480.0)).bands[0]
    slow = parse(text.format(rpm=450.0)).bands[0]
    assert fast.hz == (10.0, 1000.0) and slow.hz == (2.0, 1000.0)
    assert fast.quantity == "velocity"
    assert (fast.warning, fast.alarm) == ISO_10816_3[preset]
