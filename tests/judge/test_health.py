"""Health checks fed by hand-made blocks, counters and spectra.

The checks, their limits, windows and delays are this project's choices
(README, `[health]`); every expected time, share and count below is worked
by hand from them on invented signals. Facts of the trade are marked common
practice where they are used.
"""

import numpy as np
import pytest

from monitor.config import HealthConfig
from monitor.judge.health import Health
from monitor.analyse.spectrum import SpectralStage

FS = 1000.0


def health(**kw):
    return Health(HealthConfig(**kw), ["x", "y"], FS)


def names(changes):
    return [(c.name, c.channel, change[1]) for c, change in changes]


def noise(n, seed=0):
    return np.random.default_rng(seed).normal(size=(n, 2))


def test_gap_fault_while_a_gap_is_inside_the_window():
    h = health(window=2.0)
    out = []
    for k in range(60):  # 0.1 s blocks, 6 s; block 10 follows 50 lost samples
        lost = 50 if k == 10 else 0
        t = (k + 1) * 0.1 - 1 / FS
        out += [(round(t, 3), *x) for x in names(h.on_block(noise(100, k), k * 100, lost, t, None, None, None))]
    # Raised at the block after the break, cleared once it left the 2 s window.
    assert out[0] == (1.099, "gap", None, "fault")
    assert out[1][1:] == ("gap", None, "normal") and 3.0 <= out[1][0] <= 3.3
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
    # (common practice).
    h = health(clipping=0.01)
    raw = np.zeros((100, 2))
    raw[:, 0] = np.linspace(-1000, 1000, 100)
    raw[:5, 1] = -32768
    raw[5:, 1] = np.linspace(-1000, 1000, 95)
    assert names(h.on_block(raw, 0, 0, 0.1, 32767.0, None, None)) == [("clipping", "y", "fault")]
    assert h.clipping[1].value == pytest.approx(0.05)


def test_float_samples_never_count_as_clipped():
    h = health(clipping=0.001)
    raw = np.full((100, 2), 40000.0)
    raw[:, 0] += np.arange(100)
    raw[:, 1] -= np.arange(100)
    assert names(h.on_block(raw, 0, 0, 0.1, None, None, None)) == []


def test_flatline_after_its_seconds_and_cleared_when_it_moves():
    h = health(flatline=1.0)
    out = []
    for k in range(30):
        raw = noise(100, k)
        if 5 <= k < 20:
            raw[:, 1] = 3.0  # stuck
        out += [(k, *x) for x in names(h.on_block(raw, k * 100, 0, (k * 100 + 99) / FS, None, None, None))]
    # Stuck from t=0.5; 1 s later at the end of block 14 (t=1.499): value 0.999,
    # so the fault comes with block 15.
    assert out == [(15, "flatline", "y", "fault"), (20, "flatline", "y", "normal")]


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
    h = health(stale=2.0)
    assert names(h.on_quiet(1.9, 0.0)) == []
    assert names(h.on_quiet(2.0, 0.0)) == [("stale", None, "fault")]
    assert names(h.on_block(noise(10), 0, 0, 0.01, None, None, None)) == [("stale", None, "normal")]


def test_rows_cover_every_check():
    rows = health().rows()
    assert {(r["name"], r["channel"]) for r in rows} == {
        ("stale", None), ("gap", None), ("corrupt", None), ("rate", None),
        ("clipping", "x"), ("clipping", "y"), ("flatline", "x"), ("flatline", "y"),
        ("nyquist", "x"), ("nyquist", "y"), ("queue", None), ("config", None),
    }


def test_queue_fault_from_first_drop_until_the_queue_empties():
    h = health()
    steps = [(0, 0), (0, 500), (3, 1000), (7, 1000), (7, 20), (7, 0), (7, 0), (9, 1000)]
    out = [(i, *x) for i, (d, q) in enumerate(steps) for x in names(h.on_delivery(d, q, float(i)))]
    assert out == [(2, "queue", None, "fault"), (5, "queue", None, "normal"), (7, "queue", None, "fault")]


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
