"""The whole monitor on a misbehaving link: real TCP sockets on loopback.

Invented scenarios: a 50 Hz tone whose RMS steps between levels, against a
band with warning 1 and alarm 3, sent as 256-sample int16 frames. A noisy
link (CRC-broken frames, garbage between frames) is held against a clean one
with the same samples; a 60 s burst sent at once against `replay` of the
same samples; a corrupt share hovering at its limit against the rule of
README's [health] table.
"""

import dataclasses
import io
import json
import socket
import threading
import time
import wave

import numpy as np

from monitor.acquire.decoders.frame import encode_frame
from monitor.acquire.sources import open_source
from monitor.commands.replay import replay
from monitor.config import parse
from monitor.service.monitor import Monitor
from rig import ListSink

FS = 10240
FRAME = 256
SCALE = 3e-4  # m/s2 per count: the 5 m/s2 RMS tone peaks at about 23600 counts

NOISY = f"""
[node]
name = "noisy-1"
[source]
kind = "tcp-server"
host = "127.0.0.1"
port = 1
sample_rate = {FS}.0
channels = ["x"]
unit = "m/s2"
scale = {SCALE}
format = "frame"
[spectrum]
size = 4096
overlap = 0.5
window = "hann"
averages = 4
[[band]]
name = "tone"
hz = [40.0, 60.0]
quantity = "acceleration"
warning = 1.0
alarm = 3.0
hysteresis = 0.2
delay = 1.0
"""


def config_on_any_port(text):
    """The config with its tcp-server on a port the kernel picks."""
    config = parse(text, "link.toml")
    return dataclasses.replace(config, source=dataclasses.replace(config.source, port=0))


def step_counts(seconds=30.0, seed=3):
    """The scenario as int16 counts, (n, 1)."""
    n = int(seconds * FS)
    t = np.arange(n) / FS
    rms = np.select([t < 10, t < 20], [0.5, 2.0], 5.0)
    x = rms * np.sqrt(2) * np.sin(2 * np.pi * 50.0 * t) + np.random.default_rng(seed).normal(0, 0.05, n)
    return np.round(x / SCALE).astype(np.int16)[:, None]


def encode(counts, broken=0.0, garbage=0.0, seed=7, broken_at=()):
    """Frames of FRAME samples with rising sequence numbers. A share `broken`
    of them, and those numbered in `broken_at`, have one payload byte flipped
    (the CRC fails), and `garbage` random bytes precede a share of them.
    Returns the bytes and the number of samples in good frames."""
    rng = np.random.default_rng(seed)
    broken_at = set(broken_at)
    out = []
    good = 0
    for k, start in enumerate(range(0, len(counts), FRAME)):
        frame = bytearray(encode_frame(counts[start : start + FRAME], seq=k))
        if rng.random() < garbage:
            out.append(rng.integers(0, 256, int(rng.integers(1, 64)), dtype=np.uint8).tobytes())
        if rng.random() < broken or k in broken_at:
            frame[20 + int(rng.integers(0, 2 * FRAME))] ^= 0x5A
        else:
            good += len(counts[start : start + FRAME])
        out.append(bytes(frame))
    return b"".join(out), good


def run_over_tcp(config, data, good_samples, seconds=60.0):
    """The monitor on a tcp-server source; a peer sends `data` as fast as
    the socket takes it. Stops once `good_samples` samples have been read."""
    source = open_source(config.source)
    source.open()
    sink = ListSink()
    monitor = Monitor(config, source, sink)
    stop = threading.Event()
    runner = threading.Thread(target=monitor.run, args=(stop,), daemon=True)
    runner.start()
    peer = socket.create_connection(source.address, timeout=5.0)
    sender = threading.Thread(target=peer.sendall, args=(data,), daemon=True)
    sender.start()
    try:
        deadline = time.monotonic() + seconds
        seen, still_since = -1, time.monotonic()
        while source.samples < good_samples and time.monotonic() < deadline:
            if source.samples != seen or sender.is_alive() or source.queued:
                seen, still_since = source.samples, time.monotonic()
            elif time.monotonic() - still_since > 2.0:
                break  # all sent, all read, and still short: samples were lost
            time.sleep(0.01)
        # The block counted last is fed before the loop looks at `stop`.
        stop.set()
        runner.join(10.0)
        sender.join(10.0)
        counters = source.counters()
    finally:
        stop.set()
        peer.close()
        source.close()
    assert source.samples == good_samples, "the monitor did not get every sample that was sent"
    return monitor, sink, counters


def band_changes(sink):
    return [(e["stream_s"], e["previous"], e["level"]) for e in sink.of("event") if e["kind"] == "band"]


def test_a_noisy_link_costs_a_frame_per_gap_not_the_average():
    config = config_on_any_port(NOISY)
    counts = step_counts()
    clean_data, clean_good = encode(counts)
    noisy_data, noisy_good = encode(counts, broken=0.02, garbage=0.10)
    clean, clean_sink, _ = run_over_tcp(config, clean_data, clean_good)
    noisy, noisy_sink, counters = run_over_tcp(config, noisy_data, noisy_good)
    assert counters["corrupt_frames"] > 0 and counters["gaps"] > 0 and counters["corrupt_bytes"] > 0
    assert counters["overflows"] == 0  # the comparison is about gaps, not drops
    ratio = noisy.results / clean.results
    expected = band_changes(clean_sink)
    got = band_changes(noisy_sink)
    delays = [g[0] - e[0] for e, g in zip(expected, got)]
    print(f"results {noisy.results}/{clean.results} = {ratio:.3f}; {counters['gaps']} gaps; "
          f"level change delays {[round(d, 3) for d in delays]} s")
    # The thresholds of this project's acceptance: at least 70 % of the clean
    # run's results, each level change within 1 s of the clean run's.
    assert ratio >= 0.7
    assert [g[1:] for g in got] == [e[1:] for e in expected]
    assert [e[1:] for e in expected] == [("normal", "warning"), ("warning", "alarm")]
    assert all(abs(d) <= 1.0 for d in delays)


def burst_counts(seconds=60.0, seed=5):
    """Two channels as int16 counts: on x the 50 Hz tone at RMS 0.5, 2 from
    15 s, 5 from 30 s and 0.5 again from 45 s; y stays at 0.5."""
    n = int(seconds * FS)
    t = np.arange(n) / FS
    rms = np.select([t < 15, t < 30, t < 45], [0.5, 2.0, 5.0], 0.5)
    noise = np.random.default_rng(seed).normal(0, 0.05, (n, 2))
    tone = np.sqrt(2) * np.sin(2 * np.pi * 50.0 * t)
    x = np.column_stack([rms * tone, 0.5 * tone]) + noise
    return np.round(x / SCALE).astype(np.int16)


def write_wav(path, counts):
    """A plain int16 WAV of the same counts, by the standard library's wave module."""
    with wave.open(str(path), "wb") as w:
        w.setnchannels(counts.shape[1])
        w.setsampwidth(2)
        w.setframerate(FS)
        w.writeframes(counts.tobytes())


def comparable(events):
    """Events without the wall-clock `time` and the id (which counts them);
    `stale` measures silence on the wall clock, which a replay never does."""
    return [{k: v for k, v in e.items() if k not in ("time", "id")} for e in events if e["name"] != "stale"]


def test_a_burst_over_tcp_gives_the_events_of_a_replay_of_the_same_samples(tmp_path):
    # A gateway flushing 60 s of buffered frames at once: the monitor reads
    # them as fast as it measures, and TCP flow control holds the rest back.
    text = NOISY.replace('channels = ["x"]', 'channels = ["x", "y"]')
    config = config_on_any_port(text)
    counts = burst_counts()
    data, good = encode(counts)
    monitor, sink, counters = run_over_tcp(config, data, good)
    assert counters["paused"] > 0  # the measuring thread lagged and the reader waited
    assert counters["overflows"] == 0 and counters["gaps"] == 0
    path = tmp_path / "burst.wav"
    write_wav(path, counts)
    out = io.StringIO()
    replayed = replay(config, str(path), out)
    assert replayed.tally.results == monitor.results
    expected = [json.loads(line) for line in out.getvalue().splitlines()]
    live = sink.of("event")
    print(f"burst: {len(live)} events live, {len(expected)} in the replay; "
          f"reader paused {counters['paused']} times; {monitor.results} results")
    assert [(e["name"], e["level"]) for e in expected if e["kind"] == "band"] == [
        ("tone", "warning"), ("tone", "alarm"), ("tone", "warning"), ("tone", "normal")]
    assert comparable(live) == comparable(expected)


def health_changes(sink, name):
    return [(e["stream_s"], e["level"]) for e in sink.of("event") if e["kind"] == "health" and e["name"] == name]


def test_a_corrupt_share_hovering_at_its_limit_gives_one_fault_and_one_clear():
    # For the first 60 s about one frame in 100 fails its CRC: over the 10 s
    # window (400 frames) the share sits at the default limit of 0.01, a
    # little above or below it as frames enter and leave the window. Then
    # the link is clean for 40 s.
    rng = np.random.default_rng(11)
    per_s = FS // FRAME
    broken_at = [k * 100 + int(rng.integers(-10, 10 + 1)) for k in range(1, 60 * per_s // 100)]
    counts = step_counts(seconds=100.0)
    data, good = encode(counts, broken_at=broken_at)
    last_broken_s = (broken_at[-1] + 1) * FRAME / FS
    # Without hysteresis and hold (how the checks behaved before) the same
    # stream makes the check chatter: that is the storm prevented below.
    chatter = config_on_any_port(NOISY + "[health]\nhysteresis = 0.0\nhold = 0.0\n")
    _, sink, _ = run_over_tcp(chatter, data, good)
    toggles = len(health_changes(sink, "corrupt"))
    _, sink, counters = run_over_tcp(config_on_any_port(NOISY), data, good)
    # A false sync inside a broken frame's bytes may count once more.
    assert counters["gaps"] == len(broken_at) and counters["corrupt_frames"] >= len(broken_at)
    corrupt = health_changes(sink, "corrupt")
    print(f"corrupt share at its limit: {toggles} changes without hysteresis and hold, "
          f"{len(corrupt)} with the defaults: {corrupt}; last broken frame at {last_broken_s:.2f} s")
    # At least two faults and two clears: a storm, where the defaults give one
    # of each. (How many exactly depends on when the reader's counters are
    # read, which batching and machine load move.)
    assert toggles >= 4
    assert [level for _, level in corrupt] == ["fault", "normal"]
    # The clear comes after the corruption stopped, and no later than the
    # window (10 s) plus the hold (10 s) after it (README, [health]).
    assert last_broken_s < corrupt[1][0] <= last_broken_s + 10.0 + 10.0 + 0.2
    # Every broken frame is also a gap: one fault, one clear as well.
    assert [level for _, level in health_changes(sink, "gap")] == ["fault", "normal"]
