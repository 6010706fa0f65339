"""Envelope spectra: demodulation against scipy.signal.hilbert, and an
invented outer-race fault that the envelope shows and the raw spectrum hides."""

import numpy as np
import pytest
import scipy.signal

from monitor.config import parse
from monitor.analyse.envelope import EnvelopeStage
from monitor.service.monitor import Monitor
from monitor.acquire.sources.memory import ArraySource
from rig import ListSink

FS, SIZE = 20480.0, 8192


def test_envelope_equals_scipy_hilbert_magnitude():
    # scipy.signal.hilbert builds the analytic signal the same way (FFT,
    # double positive, drop negative frequencies); with the carrier band
    # covering all the signal's content the envelopes agree.
    t = np.arange(SIZE) / FS
    x = (1 + 0.5 * np.cos(2 * np.pi * 87.5 * t)) * np.cos(2 * np.pi * 3000 * t)
    stage = EnvelopeStage(FS, SIZE, "hann", 1, 1, (2000.0, 4000.0))
    ours = stage.envelope(x[None, :])[0]
    ref = np.abs(scipy.signal.hilbert(x))
    assert np.max(np.abs(ours - ref)) < 1e-9


def test_modulation_line_reads_its_rms():
    # Common practice: (1 + m cos(2 pi fm t)) cos(2 pi fc t) has the envelope
    # 1 + m cos(2 pi fm t), a line at fm of RMS m / sqrt(2).
    t = np.arange(4 * SIZE) / FS
    m, fm = 0.3, 87.5
    x = (1 + m * np.cos(2 * np.pi * fm * t)) * np.cos(2 * np.pi * 3000 * t)
    stage = EnvelopeStage(FS, SIZE, "hann", 3, 1, (2000.0, 4000.0))
    hop = SIZE // 2
    spec = None
    for i in range(3):
        spec = stage.push(x[None, i * hop : i * hop + SIZE])
    k = int(round(fm / spec.bin_hz))
    assert spec.rms_amplitude[0, k] == pytest.approx(m / np.sqrt(2), rel=1e-6)


CONFIG = """
[node]
name = "bearing-rig"
[source]
kind = "simulator"
sample_rate = 20480.0
channels = ["x"]
unit = "g"
realtime = false
[spectrum]
size = 8192
overlap = 0.5
averages = 4
[speed]
rpm = 1500.0
[envelope]
band_hz = [2500.0, 4500.0]
[[bearing]]
name = "de"
elements = 9
element_diameter = 7.94
pitch_diameter = 39.04
[[band]]
name = "outer-env"
bearing = "de"
defect = "bpfo"
spectrum = "envelope"
quantity = "acceleration"
warning = 0.02
delay = 1.0
[[band]]
name = "outer-raw"
bearing = "de"
defect = "bpfo"
quantity = "acceleration"
"""


def outer_race_fault(seconds, strength, seed=0):
    """An invented machine: 1x at 25 Hz, noise, and (from the middle on)
    impacts at BPFO = 3.585 x 25 Hz that ring a 3.5 kHz resonance. BPFO in
    orders, n/2 (1 - d/D) with n = 9, d = 7.94, D = 39.04, is 3.584785
    (Randall and Antoni 2011, worked by hand; geometry from memory)."""
    n = int(seconds * FS)
    t = np.arange(n) / FS
    rng = np.random.default_rng(seed)
    x = 0.2 * np.sin(2 * np.pi * 25.0 * t) + rng.normal(0, 0.05, n)
    bpfo = 3.584785 * 25.0
    ring = np.exp(-t[:400] * 800.0) * np.sin(2 * np.pi * 3500.0 * t[:400])
    impacts = np.zeros(n)
    for k in np.arange(seconds / 2, seconds, 1.0 / bpfo):
        impacts[int(k * FS)] = strength
    return (x + np.convolve(impacts, ring)[:n])[:, None]


def test_outer_race_fault_shows_in_the_envelope_band():
    config = parse(CONFIG)
    band = config.bands[0]
    # The band's edges: BPFO x 25 Hz +- 5 % (Randall and Antoni 2011 orders;
    # width 0.05 is the README's default).
    assert band.edges_hz(25.0) == pytest.approx((3.584785 * 25 * 0.95, 3.584785 * 25 * 1.05), rel=1e-5)
    sink = ListSink()
    x = outer_race_fault(20.0, 0.5)
    monitor = Monitor(config, ArraySource(config.source, x), sink)
    monitor.run()
    events = [e for e in sink.of("event") if e["kind"] == "band"]
    assert [(e["name"], e["level"]) for e in events] == [("outer-env", "warning")]
    assert events[0]["stream_s"] > 10.0  # only once the impacts started
    bands = {b.name: b.value for b in monitor.latest.bands}
    healthy = Monitor(config, ArraySource(config.source, outer_race_fault(8.0, 0.0)), ListSink())
    healthy.run()
    before = {b.name: b.value for b in healthy.latest.bands}
    # The envelope band grows many times over; the raw band at the same
    # frequencies barely moves (the impacts' energy sits at 3.5 kHz). The
    # factors 10 and 1.5 are this invented scenario's margins, not a standard.
    assert bands["outer-env"] > 10 * before["outer-env"]
    assert bands["outer-raw"] < 1.5 * before["outer-raw"]
