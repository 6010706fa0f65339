"""Raw capture around an alarm: the file holds exactly the samples around its
trigger, and a link drop (a real TCP socket reset) writes it at once."""

import os
import threading
import time

import numpy as np
import pytest
import scipy.io.wavfile

from monitor.config import parse
from monitor.acquire.decoders.frame import FLOAT32, encode_frame
from monitor.acquire.recording import open_recording
from monitor.acquire.sources import open_source
from monitor.acquire.sources.memory import ArraySource
from monitor.service.monitor import Monitor
from rig import CAPTURE as CONFIG
from rig import FS, ListSink, scenario
from sockets import listener, reset, wait_until

# scipy warns about our metadata chunk, which plain readers skip by design.
pytestmark = pytest.mark.filterwarnings("ignore::scipy.io.wavfile.WavFileWarning")

def run(tmp_path, x):
    config = parse(CONFIG.format(dir=tmp_path / "captures"))
    sink = ListSink()
    monitor = Monitor(config, ArraySource(config.source, x, block=300), sink)
    monitor.run()
    return monitor, sink


def test_capture_holds_the_samples_around_the_trigger(tmp_path):
    x = scenario(20.0, [(10.0, 2.0)])
    monitor, sink = run(tmp_path, x)
    event = [e for e in sink.of("event") if e["kind"] == "band"][0]
    path = tmp_path / "captures" / event["capture"]
    assert path.exists()
    # Read with scipy.io.wavfile as the outside reference.
    rate, data = scipy.io.wavfile.read(path)
    assert rate == int(FS) and data.dtype == np.float32
    trigger = int(round(event["stream_s"] * FS)) + 1  # one past the result's last sample
    expected = x[trigger - int(4 * FS) : trigger + int(2 * FS)].astype(np.float32)
    assert data.shape == expected.shape
    assert np.array_equal(data, expected)
    meta = open_recording(str(path)).metadata
    assert meta["capture"]["trigger_s"] == pytest.approx(4.0)
    assert meta["capture"]["events"][0]["id"] == event["id"]


def test_only_the_newest_captures_are_kept(tmp_path):
    # Three rises, far enough apart to give three captures; keep = 2.
    x = scenario(60.0, [(10.0, 2.0), (15.0, 0.2), (30.0, 2.0), (35.0, 0.2), (50.0, 2.0), (55.0, 0.2)])
    _, sink = run(tmp_path, x)
    names = [e["capture"] for e in sink.of("event") if e.get("capture")]
    assert len(set(names)) == 3
    assert sorted(os.listdir(tmp_path / "captures")) == sorted(names[1:])


def test_a_capture_pending_at_shutdown_is_written_with_what_arrived(tmp_path):
    x = scenario(11.0, [(10.0, 2.0)])
    _, sink = run(tmp_path, x)
    event = [e for e in sink.of("event") if e["kind"] == "band"][0]
    _, data = scipy.io.wavfile.read(tmp_path / "captures" / event["capture"])
    trigger = int(round(event["stream_s"] * FS)) + 1
    assert np.array_equal(data, x[trigger - int(4 * FS) :].astype(np.float32))


# The same machine over a real TCP link.
TCP = CONFIG.replace('kind = "simulator"', 'kind = "tcp-client"\nhost = "127.0.0.1"\nport = {port}\nformat = "frame"'
                     ).replace("realtime = false\n", "")


def send(peer, x, first, last, seq):
    """Samples first..last as float32 frames of 256, at about 12 times real time."""
    for at in range(first, last, 256):
        peer.sendall(encode_frame(x[at : min(at + 256, last)], seq=seq, sample_type=FLOAT32))
        seq += 1
        time.sleep(0.01)
    return seq


@pytest.mark.parametrize("comes_back", [True, False])
def test_a_link_drop_mid_capture_writes_it_at_once_around_its_trigger(tmp_path, comes_back):
    # An invented machine over a real TCP link: the tone steps up at 10 s,
    # the link drops half a second later, before the capture's 2 s `after`.
    x = scenario(14.0, [(10.0, 2.0)])
    drop = int(10.5 * FS)
    server = listener()
    config = parse(TCP.format(port=server.getsockname()[1], dir=tmp_path / "captures"))
    sink = ListSink()
    monitor = Monitor(config, open_source(config.source), sink)
    monitor.source.open()
    stop = threading.Event()
    runner = threading.Thread(target=monitor.run, args=(stop,))
    runner.start()
    try:
        peer, _ = server.accept()
        seq = send(peer, x, 0, drop, 0)
        assert wait_until(lambda: monitor._samples == drop and sink.of("event"), 10)
        reset(peer)
        if comes_back:
            peer, _ = server.accept()  # the source dials again; 20 s of frames never came
            send(peer, x, drop, drop + int(1.0 * FS), seq + 160)
        else:
            server.close()  # nothing more: the source goes stale after [health] stale = 2 s
        event = [e for e in sink.of("event") if e["kind"] == "band"][0]
        path = tmp_path / "captures" / event["capture"]
        # Written on time: while the monitor still runs, not at shutdown.
        assert wait_until(path.exists, 5), "the capture waited past the link drop"
        assert runner.is_alive()
    finally:
        stop.set()
        runner.join(10)
        monitor.source.close()
        server.close()
    _, data = scipy.io.wavfile.read(path)
    trigger = int(round(event["stream_s"] * FS)) + 1
    # Exactly the samples sent around the trigger, up to the drop (float32 frames round-trip exactly).
    assert np.array_equal(data, x[trigger - int(4 * FS) : drop].astype(np.float32))
    meta = open_recording(str(path)).metadata["capture"]
    assert meta["trigger_s"] == pytest.approx(4.0)
    assert meta["after_s"] == pytest.approx((drop - trigger) / FS)
    assert meta["cut"].startswith("a gap" if comes_back else "no samples for")


def test_a_capture_with_no_after_is_written_at_its_trigger(tmp_path):
    text = CONFIG.replace("after = 2.0", "after = 0.0").format(dir=tmp_path / "captures")
    config = parse(text)
    x = scenario(14.0, [(10.0, 2.0)])
    sink = ListSink()
    Monitor(config, ArraySource(config.source, x, block=300), sink).run()
    event = [e for e in sink.of("event") if e["kind"] == "band"][0]
    _, data = scipy.io.wavfile.read(tmp_path / "captures" / event["capture"])
    trigger = int(round(event["stream_s"] * FS)) + 1
    assert np.array_equal(data, x[trigger - int(4 * FS) : trigger].astype(np.float32))
    assert open_recording(str(tmp_path / "captures" / event["capture"])).metadata["capture"]["cut"] is None
