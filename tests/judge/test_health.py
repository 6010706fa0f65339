"""Health checks fed by hand-made blocks, counters and spectra.

The checks, their limits, windows and delays are this project's choices
(README, `[health]`); every expected time, share and count below is worked
by hand from them on invented signals. Facts of the trade are marked common
practice where they are used.
"""

import dataclasses
import logging

import numpy as np
import pytest

from monitor.acquire.decoders.frame import encode_frame
from monitor.acquire.sources.memory import ArraySource, BytesSource
from monitor.analyse.spectrum import SpectralStage
from monitor.config import HealthConfig, parse
from monitor.judge.health import Health
from monitor.service.monitor import Monitor
from rig import ListSink

FS = 1000.0


def health(scale=None, unit="g", **kw):
    # Most tests feed blocks and no results: `blind` is kept out of their way
    # and tested on its own.
    kw.setdefault("blind", 3600.0)
    return Health(HealthConfig(**kw), ["x", "y"], FS, scale=scale, unit=unit)


def names(changes):
    return [(c.name, c.channel, change[1]) for c, change in changes]


def noise(n, seed=0):
    return np.random.default_rng(seed).normal(size=(n, 2))


def test_gap_fault_while_a_gap_is_inside_the_window():
    h = health(window=2.0, hold=1.0)
    out = []
    for k in range(60):  # 0.1 s blocks, 6 s; block 10 follows 50 lost samples
        lost = 50 if k == 10 else 0
        t = (k + 1) * 0.1 - 1 / FS
        out += [(round(t, 3), *x) for x in names(h.on_block(noise(100, k), k * 100, lost, t, None, None, None))]
    # Raised at the block after the break; cleared once it has left the 2 s
    # window and the count has stayed at 0 for the 1 s hold.
    assert out[0] == (1.099, "gap", None, "fault")
    assert out[1][1:] == ("gap", None, "normal") and 4.0 <= out[1][0] <= 4.3
    assert len(out) == 2


def test_corrupt_share_over_the_window():
    h = health(window=1.0, corrupt=0.05)
    out = []
    for k in range(20):
        # 10 % of frames rejected from the 5th block on.
        counters = {"frames": 9 * k, "corrupt_frames": max(0, k - 5)}
        out += names(h.on_block(noise(100, k), k * 100, 0, (k + 1) * 0.1, None, None, counters))
    assert out == [("corrupt", None, "fault")]
    assert h.corrupt.value == pytest.approx(1 / 10, rel=0.01)


def test_clipping_at_the_integer_full_scale():
    # int16 full scale is 32767 (and -32768): samples there are clipped
    # (common practice). The counts are of a +-2 g sensor: 2 / 32768 g each.
    h = health(clipping=0.01, scale=[2 / 32768] * 2)
    raw = np.zeros((100, 2))
    raw[:, 0] = np.linspace(-1000, 1000, 100)
    raw[:5, 1] = -32768
    raw[5:, 1] = np.linspace(-1000, 1000, 95)
    assert names(h.on_block(raw, 0, 0, 0.1, 32767.0, None, None)) == [("clipping", "y", "fault")]
    assert h.clipping[1].value == pytest.approx(0.05)


def test_float_samples_never_count_as_clipped():
    h = health(clipping=0.001, implausible=1e6)
    raw = np.full((100, 2), 40000.0)
    raw[:, 0] += np.arange(100)
    raw[:, 1] -= np.arange(100)
    assert names(h.on_block(raw, 0, 0, 0.1, None, None, None)) == []


def test_flatline_after_its_seconds_and_cleared_when_it_moves():
    h = health(flatline=1.0, hold=1.0)
    out = []
    for k in range(40):
        raw = noise(100, k)
        if 5 <= k < 20:
            raw[:, 1] = 3.0  # stuck
        out += [(k, *x) for x in names(h.on_block(raw, k * 100, 0, (k * 100 + 99) / FS, None, None, None))]
    # Stuck from t=0.5; 1 s later at the end of block 14 (t=1.499): value 0.999,
    # so the fault comes with block 15. Moving again from block 20 (value
    # about 0 from t=2.099), it clears after the 1 s hold, with block 30.
    assert out == [(15, "flatline", "y", "fault"), (30, "flatline", "y", "normal")]


def test_rate_disagreeing_with_timestamps():
    h = health(rate=0.01)
    out = []
    t_us = 1_700_000_000_000_000
    for k in range(100):  # 100 frames of 100 samples; the sensor really runs at 1020 Hz
        stamp = t_us + int(k * 100 / 1020.0 * 1e6)
        out += names(h.on_block(noise(100, k), k * 100, 0, (k * 100 + 99) / FS, None, stamp, None))
    assert out == [("rate", None, "fault")]
    assert h.rate.value == pytest.approx(0.02, abs=1e-3)


def test_rate_true_to_timestamps_is_quiet():
    h = health(rate=0.01)
    for k in range(100):
        stamp = 1_700_000_000_000_000 + int(k * 100 / FS * 1e6)
        assert names(h.on_block(noise(100, k), k * 100, 0, (k * 100 + 99) / FS, None, stamp, None)) == []
    assert h.rate.value == pytest.approx(0.0, abs=1e-5)


def test_alias_guard_fires_when_energy_sits_near_nyquist():
    # Sampling theorem (common practice): a tone at f sampled at fs shows at
    # |f - k fs| folded into [0, fs/2]; a tone at 1.08 fs lands at 0.08 fs,
    # one at 0.54 fs lands at 0.46 fs, close under Nyquist, where the guard
    # must warn.
    size = 1024
    stage = SpectralStage(FS, size, "hann", 1, 2)
    t = np.arange(size) / FS
    low = np.sin(2 * np.pi * 1.08 * FS * t)  # shows at 80 Hz
    high = np.sin(2 * np.pi * 0.54 * FS * t)  # shows at 460 Hz, inside the top 10 %
    spec = stage.push(np.vstack([low, high]) + 0.001 * np.random.default_rng(1).normal(size=(2, size)))
    assert abs(spec.freqs[np.argmax(spec.psd[0])] - 80.0) <= spec.bin_hz
    h = health(nyquist=0.2)
    out = []
    for k in range(10):
        out += names(h.on_spectrum(spec, k * 0.5))
    assert out == [("nyquist", "y", "fault")]  # after its 2 s delay
    assert h.nyquist[0].value < 0.01 and h.nyquist[1].value > 0.9


def test_stale_after_its_seconds():
    h = health(stale=2.0, hold=1.0)
    assert names(h.on_quiet(1.9, 0.0)) == []
    assert names(h.on_quiet(2.0, 0.0)) == [("stale", None, "fault")]
    # Samples again: the fault clears after 1 s (the hold) of stream time.
    assert names(h.on_block(noise(10), 0, 0, 0.01, None, None, None)) == []
    assert names(h.on_block(noise(10), 10, 0, 0.5, None, None, None)) == []
    assert names(h.on_block(noise(10), 20, 0, 1.01, None, None, None)) == [("stale", None, "normal")]


def test_rows_cover_every_check():
    rows = health().rows()
    assert {(r["name"], r["channel"]) for r in rows} == {
        ("stale", None), ("gap", None), ("corrupt", None), ("rate", None),
        ("clipping", "x"), ("clipping", "y"), ("flatline", "x"), ("flatline", "y"),
        ("nyquist", "x"), ("nyquist", "y"), ("implausible", "x"), ("implausible", "y"),
        ("blind", None), ("queue", None), ("config", None),
    }


def test_blind_when_samples_arrive_but_no_result_comes():
    # Its default limit: twice the samples a result needs from a standing
    # start (here 1.5 s), but at least 5 s (a choice of this project).
    assert Health(HealthConfig(), ["x"], FS, span=1500).blind.rule.limits == [("fault", 5.0)]
    assert Health(HealthConfig(), ["x"], FS, span=4000).blind.rule.limits == [("fault", 8.0)]
    h = health(blind=2.0, hold=1.0)
    spec = SpectralStage(FS, 256, "hann", 1, 2).push(noise(256).T)
    out = []
    for k in range(60):  # 0.1 s blocks; results up to 1 s, none from 1 s to 4 s, then again
        t = (k + 1) * 0.1 - 1 / FS
        out += [(round(t, 3), *x) for x in names(h.on_block(noise(100, k), k * 100, 0, t, None, None, None))]
        if k < 10 or k >= 40:
            out += [(round(t, 3), *x) for x in names(h.on_spectrum(spec, t))]
    # Raised once 2 s of samples came without a result (at 2.999 s), cleared
    # 1 s (the hold) after results are back at 4.099 s.
    assert out == [(2.999, "blind", None, "fault"), (5.099, "blind", None, "normal")]


def test_queue_fault_from_first_drop_until_the_queue_empties():
    h = health(hold=1.0)
    steps = [(0, 0), (0, 500), (3, 1000), (7, 1000), (7, 20), (7, 0), (7, 0), (9, 1000)]
    out = [(i, *x) for i, (d, q) in enumerate(steps) for x in names(h.on_delivery(d, q, float(i)))]
    # Emptied at step 5, cleared 1 s (the hold) later.
    assert out == [(2, "queue", None, "fault"), (6, "queue", None, "normal"), (7, "queue", None, "fault")]


def test_clipped_int16_recording_raises_clipping_through_the_pipeline(tmp_path):
    # A plain int16 WAV written by the standard library's wave module; the
    # second channel saturates at the type's limits (32767 / -32768) for 2 %
    # of its samples, as an overdriven sensor would.
    import wave

    from monitor.config import parse
    from monitor.service.monitor import Monitor
    from monitor.acquire.sources import open_source
    from rig import ListSink

    n = 20000
    x = (np.sin(2 * np.pi * 50 * np.arange(n) / FS) * 20000).astype(np.int16)
    y = x.copy()
    y[::50] = 32767
    y[25::50] = -32768
    path = tmp_path / "clipped.wav"
    with wave.open(str(path), "wb") as w:
        w.setnchannels(2)
        w.setsampwidth(2)
        w.setframerate(int(FS))
        w.writeframes(np.column_stack([x, y]).tobytes())
    config = parse(f"""
[node]
name = "clip"
[source]
kind = "file"
path = "{path}"
channels = ["x", "y"]
scale = 0.0001
[spectrum]
size = 1024
[health]
clipping = 0.01
""")
    source = open_source(config.source)
    source.open()
    sink = ListSink()
    Monitor(config, source, sink).run()
    events = [(e["name"], e["channel"], e["level"]) for e in sink.of("event")]
    assert events == [("clipping", "y", "fault")]
    assert sink.of("event")[0]["value"] == pytest.approx(0.04, rel=0.05)


# ------------------------------------------------------------- implausible

# A live stream of counts; `scale` left out or given.
COUNTS = """
[node]
name = "counts"
[source]
kind = "tcp-server"
port = 5600
sample_rate = 1000.0
channels = [{channels}]
{scale}[spectrum]
size = 256
"""


def test_implausible_counts_samples_at_or_beyond_the_bound_in_g():
    # Counts read as g (scale 1.0 left in place): 1000 g and more is the
    # bound, this project's choice (README, [health]). 10 of 100 samples of x
    # at 1500, none of y. No hold, so the fault clears as the window empties.
    h = health(window=1.0, hold=0.0)
    raw = np.zeros((100, 2))
    raw[:, 0] = np.linspace(-900, 900, 100)
    raw[::10, 0] = 1500.0
    raw[:, 1] = np.linspace(-999, 999, 100)
    assert names(h.on_block(raw, 0, 0, 0.099, None, None, None)) == [("implausible", "x", "fault")]
    assert (h.implausible[0].value, h.implausible[1].value) == (10, 0)
    assert h.implausible_channels() == [0]
    # Cleared once the samples left the 1 s window.
    out = []
    for k in range(1, 13):
        out += names(h.on_block(np.zeros((100, 2)) + k * 1e-3, k * 100, 0, (k + 1) * 0.1 - 1e-3, None, None, None))
    assert out == [("implausible", "x", "normal")]
    assert h.implausible_channels() == []


@pytest.mark.parametrize("unit, scale, bound_raw", [
    # 1000 g in m/s2 is 9806.65 (standard gravity 9.80665 m/s2, CGPM 1901);
    # with 0.001 m/s2 per count that is 9,806,650 counts.
    ("m/s2", 0.001, 9806.65 / 0.001),
    # A negative scale (an axis mounted the other way) bounds the magnitude.
    ("g", -0.5, 1000 / 0.5),
])
def test_implausible_bound_follows_unit_and_scale(unit, scale, bound_raw):
    h = health(scale=[scale, scale], unit=unit)
    below = np.full((10, 2), bound_raw * 0.999)
    assert names(h.on_block(below, 0, 0, 0.0099, None, None, None)) == []
    at = np.full((10, 2), -bound_raw * 1.0001)
    assert names(h.on_block(at, 10, 0, 0.0199, None, None, None)) == [
        ("implausible", "x", "fault"), ("implausible", "y", "fault")]


def test_implausible_samples_silence_the_band_levels_through_the_pipeline():
    # An int16 stream whose scale was left out: a tone of 20000 counts reads
    # as 20000 g. The health check faults at the first block and the bands
    # report no value (null) and raise no level; the same counts with the
    # sensor's scale (+-2 g over int16: 2 / 32768 g per count) raise the band.
    text = COUNTS.format(channels='"x", "y"', scale="") + """
[[band]]
name = "tone"
hz = [40.0, 60.0]
quantity = "acceleration"
warning = 0.5
delay = 0.5
"""
    counts = np.round(20000 * np.sin(2 * np.pi * 50 * np.arange(5000) / FS))
    samples = np.column_stack([counts, counts])

    def run(config):
        sink = ListSink()
        source = ArraySource(config.source, samples)
        source.open()
        Monitor(config, source, sink).run()
        return sink

    bare = parse(text)
    sink = run(bare)
    events = [(e["name"], e["channel"], e["level"]) for e in sink.of("event")]
    assert events == [("implausible", "x", "fault"), ("implausible", "y", "fault")]
    assert all(b["value"] is None for s in sink.of("summary") for b in s["bands"])
    scaled = dataclasses.replace(bare, source=dataclasses.replace(bare.source, scale=(2 / 32768,) * 2,
                                                                   scale_given=True))
    sink = run(scaled)
    assert {(e["name"], e["level"]) for e in sink.of("event")} == {("tone", "warning")}


@pytest.mark.parametrize("scale, warned", [("", True), ("scale = 6.1035e-05\n", False)])
def test_integer_frames_without_scale_are_warned_of_once(caplog, scale, warned):
    # int16 frames of the wire format (README, The sensor wire format) through
    # the stream path every link uses; without `scale` one warning gives the
    # formula (README, [source]).
    config = parse(COUNTS.format(channels='"x"', scale=scale))
    counts = np.round(300 * np.sin(2 * np.pi * 50 * np.arange(4096) / FS)).astype(np.int16)[:, None]
    chunks = [encode_frame(counts[i:i + 256], i // 256, sample_type=1) for i in range(0, 4096, 256)]
    source = BytesSource(config.source, chunks)
    source.open()
    with caplog.at_level(logging.WARNING):
        Monitor(config, source, ListSink()).run()
    source.close()
    notes = [r.getMessage() for r in caplog.records if "counts" in r.getMessage()]
    if warned:
        assert len(notes) == 1, notes
        assert "int16" in notes[0] and "2^(bits-1)" in notes[0] and "6.10352e-05" in notes[0]
    else:
        assert notes == []
