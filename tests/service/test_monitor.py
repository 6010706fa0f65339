"""The whole measuring path, source to payloads, held against scipy.signal.welch."""

import json

import numpy as np
import pytest
import scipy.signal

from monitor.config import parse
from monitor.deliver.payloads import encode
from monitor.service.monitor import Monitor
from monitor.acquire.block import Block
from monitor.acquire.sources.base import Source
from rig import BASE, FS, ListSink, run

def make(bands="", extra=""):
    return parse(BASE + extra + bands, "test.toml")


def tones(n, spec, noise=0.01, seed=0):
    t = np.arange(n) / FS
    rng = np.random.default_rng(seed)
    cols = []
    for parts in spec:
        x = sum(a * np.sqrt(2) * np.sin(2 * np.pi * f * t + 0.4) for f, a in parts)
        cols.append(x + rng.normal(0, noise, n))
    return np.column_stack(cols)


BANDS = """
[[band]]
name = "low"
hz = [9.0, 61.0]
quantity = "acceleration"
[[band]]
name = "vel"
hz = [21.0, 101.0]
quantity = "velocity"
[[band]]
name = "disp"
channel = "y"
hz = [21.0, 101.0]
quantity = "displacement"
[[band]]
name = "1x"
orders = [0.5, 1.5]
quantity = "acceleration"
"""


def test_band_values_equal_welch_on_the_same_samples():
    # Reference: scipy.signal.welch over the samples of the last result (same
    # window, segment, overlap, detrend="constant"). Band edges sit on line
    # boundaries (2 Hz lines: 9..61 Hz is lines 5..30 whole), so the sum of
    # the reference PSD over those lines times the line spacing is the band
    # power (Parseval). Velocity and displacement are held against the
    # analytic a / (2 pi f) and a / (2 pi f)^2 of the tones instead: they
    # carry the window correction of monitor.analyse.bands, which welch does not.
    config = make(BANDS)
    x = tones(20000, [[(30.0, 0.5), (80.3, 0.2)], [(30.0, 0.3), (44.4, 0.1)]])
    monitor, _ = run(config, x)
    spec = config.spectrum
    end = int(round(monitor.latest.stream_s * FS)) + 1  # one past the last sample used
    span = x[end - spec.span : end].T
    f, psd = scipy.signal.welch(span, FS, window="hann", nperseg=spec.size,
                                noverlap=spec.size - spec.hop, detrend="constant")
    df = f[1]

    def ref(ch, lo, hi):
        sel = (f > lo) & (f < hi)
        return np.sqrt(np.sum(psd[ch, sel]) * df)

    got = {(b.name, b.channel): b.value for b in monitor.latest.bands}
    assert got[("low", "x")] == pytest.approx(ref(0, 9, 61), rel=1e-9)
    assert got[("low", "y")] == pytest.approx(ref(1, 9, 61), rel=1e-9)
    # The same tones without noise (noise beside a tone moves its lines by
    # cross terms): at 15 lines and more, edges 4.5 lines or more from them,
    # the README's tables give under 0.01 % for Hann.
    quiet, _ = run(config, tones(20000, [[(30.0, 0.5), (80.3, 0.2)], [(30.0, 0.3), (44.4, 0.1)]], noise=0.0))
    got = {(b.name, b.channel): b.value for b in quiet.latest.bands}
    velocity = np.hypot(0.5 / (2 * np.pi * 30.0), 0.2 / (2 * np.pi * 80.3)) * 1e3
    displacement = np.hypot(0.3 / (2 * np.pi * 30.0) ** 2, 0.1 / (2 * np.pi * 44.4) ** 2) * 1e6
    assert got[("vel", "x")] == pytest.approx(velocity, rel=1e-4)
    assert got[("disp", "y")] == pytest.approx(displacement, rel=1e-4)
    got = {(b.name, b.channel): b.value for b in monitor.latest.bands}
    # 1x at 1800 rpm = 30 Hz (rpm/60, common practice): 0.5..1.5 orders = 15..45 Hz.
    assert got[("1x", "x")] == pytest.approx(ref(0, 15, 45), rel=1e-9)
    assert got[("1x", "x")] == pytest.approx(0.5, rel=0.01)  # the 30 Hz tone's RMS


def test_time_statistics_and_dominant_peak():
    config = make()
    x = tones(8192, [[(100.4, 2.0)], [(250.0, 1.0)]], noise=0.0)
    monitor, sink = run(config, x)
    last = sink.of("summary")[-1]
    cx = last["channels"]["x"]
    # Sine, analytic: RMS given directly here as 2.0; crest sqrt(2);
    # kurtosis 1.5 (mean of sin^4 over the mean of sin^2 squared), to 0.5 %
    # on a record of whole samples, not whole cycles. The peak: Hann at 50
    # lines and more reads within 0.0001 line and 0.001 % (README, peak
    # table); 0.02 Hz and 0.1 % leave room for the three averaged frames.
    assert cx["rms"] == pytest.approx(2.0, rel=5e-3)
    assert cx["crest"] == pytest.approx(np.sqrt(2), rel=5e-3)
    assert cx["kurtosis"] == pytest.approx(1.5, rel=5e-3)
    assert cx["dominant_hz"] == pytest.approx(100.4, abs=0.02)
    assert cx["dominant_rms"] == pytest.approx(2.0, rel=1e-3)
    # Velocity 10-1000 Hz, analytic: v = a / (2 pi f).
    assert cx["velocity_rms"] == pytest.approx(2.0 / (2 * np.pi * 100.4) * 1e3, rel=2e-3)
    assert last["channels"]["y"]["dominant_hz"] == pytest.approx(250.0, abs=0.02)
    assert cx["unit"] == "m/s2"


def test_a_silent_channel_has_no_dominant_line():
    # An all-zero channel has no spectral line at all: null, not the first
    # line of the search (README, What it measures).
    x = tones(8192, [[(100.4, 2.0)], []], noise=0.0)
    _, sink = run(make(), x)
    silent = sink.of("summary")[-1]["channels"]["y"]
    assert silent["dominant_hz"] is None and silent["dominant_rms"] is None
    assert silent["rms"] == 0.0


def test_a_tracked_speed_is_stamped_where_it_was_measured():
    # Analytic: a run-up whose phase is 2 pi (f0 t + r t^2 / 2) turns at
    # f0 + r t at time t. The speed read from a result describes the middle
    # of its samples (README, What it measures): speed_s, half a span before
    # stream_s, where the run-up is r * span / 2 = 0.37 Hz slower.
    f0, r = 20.0, 1.0
    n = int(8.0 * FS)
    t = np.arange(n) / FS
    x = np.sqrt(2) * np.sin(2 * np.pi * (f0 * t + r * t**2 / 2))
    config = make(extra="track = true\nsearch_hz = [15.0, 30.0]\n")
    monitor, sink = run(config, np.column_stack([x, x]))
    result = monitor.latest
    span_s = (config.spectrum.span - 1) / FS
    assert result.speed_s == pytest.approx(result.stream_s - span_s / 2, abs=1e-9)
    assert result.speed_hz == pytest.approx(f0 + r * result.speed_s, abs=0.05)
    assert abs(result.speed_hz - (f0 + r * result.stream_s)) > 0.3
    first = sink.of("summary")[0]
    assert first["speed_s"] == pytest.approx(first["stream_s"] - span_s / 2, abs=1e-6)
    # A nominal speed was measured nowhere.
    _, quiet = run(make(), np.column_stack([x, x]))
    assert quiet.of("summary")[0]["speed_s"] is None


def test_results_every_hop_with_stream_time_from_samples():
    config = make(extra="")
    spec = config.spectrum
    n = spec.span + 10 * spec.hop
    monitor, sink = run(config, tones(n, [[(50.0, 1.0)], [(50.0, 1.0)]]), block=333)
    assert monitor.results == 11
    # stream_s of a result is the time of its last sample (README, What is published).
    assert monitor.latest.stream_s == pytest.approx((n - 1) / FS)


def frame_psds(x, size, starts):
    """One-sided PSD of each frame of `size` samples starting at `starts`,
    as scipy.signal.welch gives it for a single segment (detrend="constant")."""
    return [scipy.signal.welch(x[s : s + size].T, FS, window="hann", nperseg=size, noverlap=0,
                               detrend="constant")[1] for s in starts]


def test_a_gap_costs_one_frame_not_the_average():
    config = make()
    spec = config.spectrum
    n = 3 * spec.span
    gap_at = spec.span + 5
    x = tones(n, [[(50.0, 1.0)], [(50.0, 1.0)]])
    monitor, _ = run(config, x, gaps={gap_at: 1000})
    # Before the gap: results from span to gap_at. After it, no frame spans
    # the gap, so the first result comes once `size` samples past it make a
    # frame, and then every hop: the averages already made are kept.
    before = 1 + (gap_at - spec.span) // spec.hop
    after = 1 + (n - gap_at - spec.size) // spec.hop
    assert monitor.results == before + after
    # Lost samples still count in stream time.
    last_end = gap_at + spec.size + (after - 1) * spec.hop
    assert monitor.latest.stream_s == pytest.approx((last_end + 1000 - 1) / FS)
    # Reference: the mean of scipy.signal.welch's single-frame PSDs of the
    # last `averages` frames that do not span the gap (Welch's average of
    # modified periodograms, which need not be contiguous).
    pre = [gap_at - spec.size - k * spec.hop for k in range(spec.averages)]
    post = [gap_at + k * spec.hop for k in range(after)]
    frames = sorted(s for s in pre if s >= 0) + post
    ref = np.mean(frame_psds(x, spec.size, frames[-spec.averages:]), axis=0)
    np.testing.assert_allclose(monitor.latest.spectrum.psd, ref, rtol=1e-9, atol=0)


def test_first_result_after_a_gap_mixes_frames_from_both_sides():
    config = make()
    spec = config.spectrum
    gap_at = spec.span + 2 * spec.hop  # the ring holds whole frames up to here
    n = gap_at + spec.size
    x = tones(n, [[(50.0, 1.0), (120.0, 0.3)], [(75.0, 0.5)]])
    monitor, _ = run(config, x, gaps={gap_at: 300})
    # One result after the gap, from the one new frame and the last
    # `averages - 1` frames before it (scipy.signal.welch per frame).
    assert monitor.results == 1 + (gap_at - spec.span) // spec.hop + 1
    starts = [gap_at - spec.size - k * spec.hop for k in range(spec.averages - 1)] + [gap_at]
    ref = np.mean(frame_psds(x, spec.size, starts), axis=0)
    np.testing.assert_allclose(monitor.latest.spectrum.psd, ref, rtol=1e-9, atol=0)
    # The summary of that result takes its time statistics from the samples
    # since the gap, the one frame; numpy's RMS of the mean-removed frame is
    # the reference (payload numbers have 6 significant digits).
    frame = x[gap_at:, 0]
    rms = np.sqrt(np.mean((frame - frame.mean()) ** 2))
    summary = monitor._summary_payload(monitor.latest)
    assert summary["channels"]["x"]["rms"] == pytest.approx(rms, rel=1e-5)


def test_an_outage_longer_than_a_span_restarts_the_average():
    config = make()
    spec = config.spectrum
    n = 3 * spec.span
    gap_at = spec.span + 5
    monitor, _ = run(config, tones(n, [[(50.0, 1.0)], [(50.0, 1.0)]]), gaps={gap_at: spec.span})
    # A choice of this project: spectra from before an outage longer than one
    # result's span are dropped, so a whole span is needed again.
    before = 1 + (gap_at - spec.span) // spec.hop
    after = 1 + (n - gap_at - spec.span) // spec.hop
    assert monitor.results == before + after


STEP_BAND = """
[[band]]
name = "tone"
channel = "x"
hz = [40.0, 60.0]
quantity = "acceleration"
warning = 1.0
alarm = 3.0
hysteresis = 0.2
delay = 1.0
"""


def expected_events(x, config, limit_rows):
    """Event times computed independently: scipy.signal.welch on the span of
    every result, summed over the band's lines, then the level rule (README, What is published)
    applied step by step."""
    spec = config.spectrum
    times, values = [], []
    end = spec.span
    while end <= len(x):
        span = x[end - spec.span : end, 0]
        f, psd = scipy.signal.welch(span, FS, window="hann", nperseg=spec.size,
                                    noverlap=spec.size - spec.hop, detrend="constant")
        sel = (f > 40) & (f < 60)
        values.append(np.sqrt(np.sum(psd[sel]) * f[1]))
        times.append((end - 1) / FS)
        end += spec.hop
    level, out = 0, []
    above = {1: None, 2: None}
    below = {1: None, 2: None}
    for t, v in zip(times, values):
        for i, lim in limit_rows.items():
            above[i] = (above[i] if above[i] is not None else t) if v >= lim else None
            below[i] = (below[i] if below[i] is not None else t) if v < lim * 0.8 else None
        new = level
        for i in (2, 1):
            if i > level and above[i] is not None and t - above[i] >= 1.0 - 1e-9:
                new = i
                break
        if new == level:
            while new > 0 and below[new] is not None and t - below[new] >= 1.0 - 1e-9:
                new -= 1
        if new != level:
            out.append((round(t, 6), ["normal", "warning", "alarm"][new]))
            level = new
    return out


def test_events_in_a_scenario_match_independent_computation():
    # An invented scenario: a 50 Hz tone at 0.5, stepping to 2 at 10 s, to 4 at
    # 20 s, back to 0.2 at 30 s.
    config = make(STEP_BAND)
    n = int(40 * FS)
    t = np.arange(n) / FS
    amp = np.select([t < 10, t < 20, t < 30], [0.5, 2.0, 4.0], 0.2)
    x = np.column_stack([amp * np.sqrt(2) * np.sin(2 * np.pi * 50 * t), np.zeros(n)])
    _, sink = run(config, x)
    events = [e for e in sink.of("event") if e["kind"] == "band"]
    expected = expected_events(x, config, {1: 1.0, 2: 3.0})
    assert [(e["stream_s"], e["level"]) for e in events] == expected
    # Falling from 4 to 0.2, the 2 s average passes below alarm's clear
    # point a little before warning's, so alarm steps down through warning.
    assert [e["level"] for e in events] == ["warning", "alarm", "warning", "normal"]
    # The silent y channel raises its flatline fault once 5 s (the default)
    # have passed, at the end of the block (512 samples) that completes them.
    health = [e for e in sink.of("event") if e["kind"] == "health"]
    assert [(e["name"], e["channel"], e["level"]) for e in health] == [("flatline", "y", "fault")]
    assert 5.0 <= health[0]["stream_s"] < 5.0 + 512 / FS
    # Ids count every event, band and health alike, in order.
    assert sorted(e["id"] for e in sink.of("event")) == [1, 2, 3, 4, 5]
    first = events[0]
    assert first["previous"] == "normal" and first["kind"] == "band" and first["channel"] == "x"
    assert (first["limits"]["warning"], first["limits"]["alarm"], first["unit"], first["quantity"]) == (1.0, 3.0, "m/s2", "acceleration")
    assert first["dominant_hz"] == pytest.approx(50.0, abs=0.05)
    # A levels snapshot follows each event.
    order = [s for s, _ in sink.messages]
    for i, s in enumerate(order):
        if s == "event":
            assert order[i + 1] == "levels"


def test_summaries_every_interval_of_stream_time():
    config = make(extra="")
    n = int(35 * FS)
    _, sink = run(config, tones(n, [[(50.0, 1.0)], [(50.0, 1.0)]]))
    stamps = [p["stream_s"] for p in sink.of("summary")]
    # Default interval 10 s: the first result, then the first result at or
    # after 10, 20 and 30 s of stream time.
    hop_s = config.spectrum.hop / FS
    assert len(stamps) == 4
    assert stamps[0] == pytest.approx((config.spectrum.span - 1) / FS)
    for i, s in enumerate(stamps[1:], start=1):
        assert 10.0 * i <= s < 10.0 * i + hop_s


class QuietSource(Source):
    """Sends one block, then nothing while a fake clock runs on."""

    def __init__(self, config, clock, samples):
        super().__init__(config)
        self.clock = clock
        self.script = [samples] + [None] * 30 + [samples]

    def _open(self):
        pass

    def _read(self, timeout):
        if not self.script:
            self.ended = True
            return None
        item = self.script.pop(0)
        self.clock.now += timeout
        return None if item is None else Block(samples=item)


class FakeClock:
    def __init__(self):
        self.now = 0.0

    def __call__(self):
        return self.now


def test_stale_fault_raised_and_cleared():
    # No hold: the fault clears with the first block after the silence.
    config = make(extra="[health]\nstale = 2.0\nhold = 0.0\n")
    clock = FakeClock()
    source = QuietSource(config.source, clock, tones(4096, [[(50.0, 1.0)], [(50.0, 1.0)]]))
    sink = ListSink()
    Monitor(config, source, sink, clock=clock).run()
    events = sink.of("event")
    assert [(e["name"], e["kind"], e["level"], e["previous"]) for e in events] == [
        ("stale", "health", "fault", "normal"),
        ("stale", "health", "normal", "fault"),
    ]
    # Health events carry what they measured and null limits (README, What is published).
    assert events[0]["value"] >= 2.0 and events[0]["limits"] == {"warning": None, "alarm": None}


def test_payloads_are_json_with_common_fields():
    config = make(STEP_BAND)
    _, sink = run(config, tones(int(12 * FS), [[(50.0, 1.5)], [(50.0, 1.0)]]))
    assert sink.messages[0][0] == "status" and sink.messages[0][1]["state"] == "online"
    assert sink.messages[-1][1]["state"] == "offline"
    for _, payload in sink.messages:
        assert payload["node"] == "rig-1"
        assert payload["time"].endswith("Z") and len(payload["time"]) == 24
        json.loads(encode(payload))
