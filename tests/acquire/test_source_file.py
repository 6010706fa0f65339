"""The `file` source: replaying WAV recordings written by our writer, by the
standard library's wave module and by scipy.io.wavfile (outside references)."""

import wave

import numpy as np
import pytest
import scipy.io.wavfile as wavfile

from monitor.config import SourceConfig
from monitor.errors import SourceError
from monitor.acquire.recording import RecordingWriter
from monitor.acquire.sources import open_source


def config(path, channels=("x", "y"), sample_rate=0.0, unit="g", realtime=False):
    return SourceConfig(kind="file", sample_rate=sample_rate, channels=tuple(channels), unit=unit,
                        scale=(1.0,) * len(channels), path=str(path), realtime=realtime)


def replay(cfg):
    source = open_source(cfg)
    source.open()
    blocks = []
    try:
        while True:
            block = source.read(1.0)
            if block is None:
                break
            blocks.append(block)
    finally:
        source.close()
    return source, blocks


def test_replays_our_recording(tmp_path):
    path = tmp_path / "run.wav"
    data = np.random.default_rng(1).normal(size=(2555, 2))
    with RecordingWriter(str(path), 1000, ["x", "y"], "g") as writer:
        writer.write(data)
    source, blocks = replay(config(path))
    assert source.ended
    assert source.sample_rate == 1000.0
    # Blocks of 0.1 s, the last one shorter.
    assert [b.samples.shape[0] for b in blocks] == [100] * 25 + [55]
    assert all(b.samples.dtype == np.float64 and b.lost == 0 for b in blocks)
    got = np.concatenate([b.samples for b in blocks])
    assert np.array_equal(got, data.astype(np.float32).astype(np.float64))
    assert source.samples == 2555
    assert source.read(0.1) is None


def test_stdlib_wave_int16_replays_raw_integers(tmp_path):
    path = str(tmp_path / "w16.wav")
    data = np.random.default_rng(2).integers(-32768, 32767, size=(4410, 1), endpoint=True).astype("<i2")
    with wave.open(path, "wb") as w:
        w.setnchannels(1)
        w.setsampwidth(2)
        w.setframerate(44100)
        w.writeframes(data.tobytes())
    source, blocks = replay(config(path, channels=["acc"], sample_rate=44100.0))
    assert source.sample_rate == 44100.0
    assert np.array_equal(np.concatenate([b.samples for b in blocks]), data)


@pytest.mark.parametrize("dtype", ["float32", "int32"])
def test_scipy_files_replay_exactly(tmp_path, dtype):
    path = str(tmp_path / f"{dtype}.wav")
    rng = np.random.default_rng(3)
    if dtype == "float32":
        data = rng.normal(size=(3000, 3)).astype(dtype)
    else:
        data = rng.integers(-(2**31), 2**31 - 1, size=(3000, 3), endpoint=True).astype(dtype)
    wavfile.write(path, 2560, data)
    source, blocks = replay(config(path, channels=["a", "b", "c"]))
    assert source.sample_rate == 2560.0
    assert [b.samples.shape[0] for b in blocks][:2] == [256, 256]
    assert np.array_equal(np.concatenate([b.samples for b in blocks]), data)


def test_sample_rate_mismatch_names_both(tmp_path):
    path = tmp_path / "r.wav"
    with RecordingWriter(str(path), 1000, ["x", "y"], "g") as writer:
        writer.write(np.zeros((10, 2)))
    with pytest.raises(SourceError, match=r"r\.wav: recorded at 1000 Hz.*sample_rate = 2000"):
        open_source(config(path, sample_rate=2000.0))


def test_channel_count_mismatch(tmp_path):
    path = tmp_path / "r.wav"
    with RecordingWriter(str(path), 1000, ["x", "y"], "g") as writer:
        writer.write(np.zeros((10, 2)))
    with pytest.raises(SourceError, match=r"r\.wav: holds 2 channel\(s\).*lists 3"):
        open_source(config(path, channels=["x", "y", "z"]))


def test_missing_and_broken_files_are_source_errors(tmp_path):
    with pytest.raises(SourceError, match=r"absent\.wav"):
        open_source(config(tmp_path / "absent.wav"))
    bad = tmp_path / "bad.wav"
    bad.write_bytes(b"not a recording at all")
    with pytest.raises(SourceError, match=r"bad\.wav: not a WAV file"):
        open_source(config(bad))


def test_a_file_bigger_than_a_block_is_never_read_whole(tmp_path):
    path = tmp_path / "long.wav"
    rate = 25600
    with RecordingWriter(str(path), rate, ["x", "y"], "g") as writer:
        for second in range(20):
            writer.write(np.full((rate, 2), float(second)))
    source = open_source(config(path))
    source.open()
    try:
        biggest = 0
        count = 0
        while True:
            block = source.read(1.0)
            if block is None:
                break
            biggest = max(biggest, block.samples.nbytes)
            count += block.samples.shape[0]
    finally:
        source.close()
    assert count == 20 * rate
    assert biggest == 2560 * 2 * 8  # 0.1 s of float64, however long the file


def test_other_names_or_unit_are_warned_about(tmp_path, caplog):
    path = tmp_path / "r.wav"
    with RecordingWriter(str(path), 1000, ["x", "y"], "g") as writer:
        writer.write(np.zeros((10, 2)))
    caplog.set_level("WARNING", logger="bandwatch.sources")
    replay(config(path, channels=["h", "v"], unit="m/s2"))
    text = caplog.text
    assert "channels recorded as x, y are read as h, v" in text
    assert "recorded in g but [source] unit = m/s2" in text


def test_the_rate_is_known_before_the_file_is_opened(tmp_path):
    """A monitor is sized from the rate when it is built, before the source opens."""
    from monitor.config import parse
    from monitor.service.monitor import Monitor
    from rig import ListSink

    path = tmp_path / "r.wav"
    with RecordingWriter(str(path), 1000, ["x"], "g") as writer:
        writer.write(np.zeros((4096, 1)))
    cfg = parse(f'[node]\nname = "n"\n[source]\nkind = "file"\npath = "{path}"\nchannels = ["x"]\nunit = "g"\n'
                '[spectrum]\nsize = 256\n', "t.toml")
    source = open_source(cfg.source)
    assert source.sample_rate == 1000.0
    monitor = Monitor(cfg, source, ListSink())
    source.open()
    try:
        monitor.run()
    finally:
        source.close()
    assert monitor.results > 0
