"""WAV recordings: our writer and reader against scipy.io.wavfile and the
standard library's wave module (both as outside references).

Hand-built headers follow the RIFF/WAVE layout (fmt fields tag, channels,
rate, byte rate, block align, bits; WAVE_FORMAT_EXTENSIBLE adds cbSize,
valid bits, channel mask and a sub-format GUID), written from memory of the
Microsoft WAVE documentation; scipy reads the same files as a cross-check.
"""

import datetime as dt
import json
import os
import struct
import subprocess
import sys
import warnings
import wave

import numpy as np
import pytest
import scipy.io.wavfile as wavfile

import monitor
from monitor.acquire.recording import META_ID, RecordingError, RecordingWriter, open_recording

GUID_TAIL = b"\x00\x00\x00\x00\x10\x00\x80\x00\x00\xaa\x00\x38\x9b\x71"


def scipy_read(path):
    with warnings.catch_warnings():
        # scipy warns about chunks it skips, such as our metadata chunk.
        warnings.simplefilter("ignore", wavfile.WavFileWarning)
        return wavfile.read(str(path))


def read_all(path, block=100_000):
    with open_recording(str(path)) as reader:
        return np.concatenate(list(reader.blocks(block)) or [np.empty((0, reader.channels))])


def chunks(path):
    """{chunk id: body} of a RIFF file, walked with struct."""
    data = open(path, "rb").read()
    found, at = {}, 12
    while at + 8 <= len(data):
        cid, size = struct.unpack_from("<4sI", data, at)
        found[cid] = data[at + 8 : at + 8 + size]
        at += 8 + size + (size & 1)
    return found


def riff(*parts):
    body = b"WAVE" + b"".join(struct.pack("<4sI", cid, len(payload)) + payload + b"\0" * (len(payload) & 1)
                              for cid, payload in parts)
    return b"RIFF" + struct.pack("<I", len(body)) + body


def fmt(tag, channels, rate, bits):
    align = channels * bits // 8
    return struct.pack("<HHIIHH", tag, channels, rate, rate * align, align, bits)


def extensible(sub, channels, rate, bits):
    align = channels * bits // 8
    return struct.pack("<HHIIHHHHI16s", 0xFFFE, channels, rate, rate * align, align, bits, 22, bits, 0,
                       struct.pack("<H", sub) + GUID_TAIL)


# ---------------------------------------------------------------- our writer


@pytest.mark.parametrize("note", ["", "x"])  # one of the two makes the metadata chunk odd-sized
def test_our_file_reads_back_in_scipy(tmp_path, note):
    path = tmp_path / "run.wav"
    data = np.random.default_rng(1).normal(0, 2, size=(12_345, 3))
    with RecordingWriter(str(path), 25600, ["x", "y", "z"], "g", extra={"note": note}) as writer:
        for start in range(0, len(data), 1000):
            writer.write(data[start : start + 1000])
    rate, got = scipy_read(path)
    assert rate == 25600
    assert got.dtype == np.float32
    assert np.array_equal(got, data.astype(np.float32))
    assert np.array_equal(read_all(path), data.astype(np.float32))
    found = chunks(path)
    # IEEE float (tag 3), 32 bits; non-PCM files carry a fact chunk with the frame count.
    assert struct.unpack_from("<HHIIHH", found[b"fmt "]) == (3, 3, 25600, 25600 * 12, 12, 32)
    assert struct.unpack("<I", found[b"fact"]) == (len(data),)
    assert json.loads(found[META_ID].decode("utf-8"))["note"] == note


def test_metadata_round_trip(tmp_path):
    path = str(tmp_path / "meta.wav")
    start = dt.datetime(2024, 3, 1, 12, 30, 5, 250_000, tzinfo=dt.timezone.utc)
    with RecordingWriter(path, 10240, ["drive-end", "Lüfter"], "m/s2", start_time=start,
                         extra={"node": "pump-2"}) as writer:
        writer.write(np.zeros((10, 2)))
    with open_recording(path) as reader:
        assert reader.channel_names == ["drive-end", "Lüfter"]
        assert reader.unit == "m/s2"
        assert reader.start_time == start
        assert reader.metadata["start_time"] == "2024-03-01T12:30:05.250Z"
        assert reader.metadata["bandwatch_version"] == monitor.__version__
        assert reader.metadata["node"] == "pump-2"
        assert (reader.sample_rate, reader.channels, reader.frames, reader.sample_type) == (10240, 2, 10, "float32")


def test_sizes_are_updated_while_writing(tmp_path):
    path = tmp_path / "live.wav"
    writer = RecordingWriter(str(path), 100, ["a"], "g", sync_seconds=1.0)
    writer.write(np.arange(150.0))
    # Still open: a plain reader already sees everything up to the last update.
    rate, got = scipy_read(path)
    assert np.array_equal(got, np.arange(150.0, dtype=np.float32))
    writer.close()


def test_crash_leaves_a_readable_file(tmp_path):
    path = tmp_path / "crash.wav"
    child = (
        "import os, numpy as np\n"
        "from monitor.acquire.recording import RecordingWriter\n"
        f"w = RecordingWriter({str(path)!r}, 1000, ['x', 'y'], 'g', sync_seconds=5.0)\n"
        "w.write(np.arange(10000.0).reshape(5000, 2))\n"  # reaches a size update
        "w.write(np.arange(10000.0, 14000.0).reshape(2000, 2))\n"  # on disk (beyond the file buffer), no update
        "os._exit(3)\n"  # die without closing
    )
    run = subprocess.run([sys.executable, "-c", child], cwd=os.getcwd(), env={**os.environ, "PYTHONPATH": os.getcwd()})
    assert run.returncode == 3
    written = np.arange(14000.0, dtype=np.float32).reshape(7000, 2)
    rate, plain = scipy_read(path)  # a plain reader: up to the last size update
    assert plain.shape[0] >= 5000 and np.array_equal(plain, written[: plain.shape[0]])
    got = read_all(path)  # ours: everything that reached the disk
    data_at = path.read_bytes()[:200].index(b"data") + 8
    on_disk = (os.path.getsize(path) - data_at) // 8
    # The second write is larger than the file buffer, so it reached the disk
    # although the header was never updated for it.
    assert got.shape[0] == on_disk > plain.shape[0]
    assert np.array_equal(got, written[: got.shape[0]])


def test_truncated_file_reads_up_to_the_cut(tmp_path):
    path = tmp_path / "cut.wav"
    data = np.random.default_rng(2).normal(size=(1000, 3)).astype(np.float32)
    with RecordingWriter(str(path), 500, ["a", "b", "c"], "g") as writer:
        writer.write(data)
    size = os.path.getsize(path)
    with open(path, "r+b") as f:
        f.truncate(size - 12 * 300 - 5)  # 300 frames and 5 bytes of one more gone
    assert np.array_equal(read_all(path), data[:699])


def test_writer_refuses_bad_input(tmp_path):
    with pytest.raises(ValueError, match="sample_rate=10240.5"):
        RecordingWriter(str(tmp_path / "a.wav"), 10240.5, ["x"], "g")
    with RecordingWriter(str(tmp_path / "b.wav"), 100, ["x", "y"], "g") as writer:
        with pytest.raises(ValueError, match=r"\(5, 3\)"):
            writer.write(np.zeros((5, 3)))
    with pytest.raises(RecordingError, match="no-such-dir"):
        RecordingWriter(str(tmp_path / "no-such-dir" / "c.wav"), 100, ["x"], "g")


# ------------------------------------------------------------ other writers


def test_stdlib_wave_int16(tmp_path):
    path = str(tmp_path / "w16.wav")
    data = np.random.default_rng(3).integers(-32768, 32767, size=(3000, 2), endpoint=True).astype("<i2")
    with wave.open(path, "wb") as w:
        w.setnchannels(2)
        w.setsampwidth(2)
        w.setframerate(8000)
        w.writeframes(data.tobytes())
    with open_recording(path) as reader:
        assert (reader.sample_rate, reader.channels, reader.sample_type) == (8000, 2, "int16")
        assert reader.channel_names is None and reader.unit is None and reader.metadata == {}
    assert np.array_equal(read_all(path, 777), data)
    assert np.array_equal(read_all(path), scipy_read(path)[1])


def test_stdlib_wave_8_and_24_bit(tmp_path):
    rng = np.random.default_rng(4)
    p8 = str(tmp_path / "w8.wav")
    raw8 = rng.integers(0, 255, size=1001, endpoint=True).astype(np.uint8)  # odd size: data chunk is padded
    with wave.open(p8, "wb") as w:
        w.setnchannels(1)
        w.setsampwidth(1)
        w.setframerate(1000)
        w.writeframes(raw8.tobytes())
    # 8-bit WAV is unsigned with 128 as zero (offset binary).
    assert np.array_equal(read_all(p8)[:, 0], scipy_read(p8)[1].astype(int) - 128)

    p24 = str(tmp_path / "w24.wav")
    values = rng.integers(-(2**23), 2**23 - 1, size=(500, 2), endpoint=True)
    packed = (values.astype("<i4").view(np.uint8).reshape(-1, 4)[:, :3]).tobytes()
    with wave.open(p24, "wb") as w:
        w.setnchannels(2)
        w.setsampwidth(3)
        w.setframerate(1000)
        w.writeframes(packed)
    got = read_all(p24)
    assert np.array_equal(got, values)
    # scipy returns 24-bit samples in the top of an int32.
    assert np.array_equal(got, scipy_read(p24)[1] >> 8)


@pytest.mark.parametrize("dtype", ["float32", "int32", "int16", "float64"])
def test_scipy_written_files(tmp_path, dtype):
    path = str(tmp_path / f"s-{dtype}.wav")
    rng = np.random.default_rng(5)
    if dtype.startswith("float"):
        data = rng.normal(size=(4000, 3)).astype(dtype)
    else:
        info = np.iinfo(dtype)
        data = rng.integers(info.min, info.max, size=(4000, 3), endpoint=True).astype(dtype)
    wavfile.write(path, 51200, data)
    with open_recording(path) as reader:
        assert (reader.sample_rate, reader.channels, reader.sample_type, reader.frames) == (51200, 3, dtype, 4000)
    assert np.array_equal(read_all(path, 999), data)


@pytest.mark.parametrize("sub,dtype", [(1, "<i2"), (1, "<i4"), (3, "<f4")])
def test_extensible_format(tmp_path, sub, dtype):
    path = str(tmp_path / "ext.wav")
    data = (np.arange(60).reshape(20, 3) * 7 - 100).astype(dtype)
    bits = np.dtype(dtype).itemsize * 8
    with open(path, "wb") as f:
        f.write(riff((b"fmt ", extensible(sub, 3, 48000, bits)), (b"data", data.tobytes())))
    assert np.array_equal(read_all(path), data)
    rate, ref = scipy_read(path)
    assert rate == 48000 and np.array_equal(read_all(path), ref)


def test_odd_chunk_padding(tmp_path):
    path = str(tmp_path / "pad.wav")
    samples = bytes([0, 128, 255, 1, 2])  # 5 bytes of 8-bit mono: odd data chunk
    with open(path, "wb") as f:
        f.write(riff((b"fmt ", fmt(1, 1, 100, 8)), (b"junk", b"abc"), (b"data", samples), (b"LIST", b"INFOxyz")))
    assert np.array_equal(read_all(path)[:, 0], np.array(list(samples)) - 128)
    assert np.array_equal(scipy_read(path)[1], np.frombuffer(samples, np.uint8))


def test_streaming_reader_matches_reading_whole(tmp_path):
    path = str(tmp_path / "big.wav")
    data = np.random.default_rng(6).normal(size=(100_003, 2)).astype(np.float32)
    wavfile.write(path, 25600, data)
    with open_recording(path) as reader:
        parts = list(reader.blocks(4096))
    assert len(parts) == 25 and all(p.shape == (4096, 2) for p in parts[:-1])
    assert np.array_equal(np.concatenate(parts), scipy_read(path)[1])
    with open_recording(path) as reader:
        reader.seek(100_000)
        assert np.array_equal(reader.read(10), data[100_000:])
        assert reader.read(10).shape == (0, 2)


# ------------------------------------------------------------------- errors


def test_not_a_wav_file(tmp_path):
    path = tmp_path / "notes.wav"
    path.write_text("x,y\n1,2\n")
    with pytest.raises(RecordingError, match=r"notes\.wav: not a WAV file"):
        open_recording(str(path))
    with pytest.raises(RecordingError, match=r"missing\.wav: cannot open"):
        open_recording(str(tmp_path / "missing.wav"))


@pytest.mark.parametrize("header,message", [
    (fmt(0x0055, 1, 8000, 16), "format tag 0x0055"),
    (fmt(6, 1, 8000, 8), "format tag 0x0006"),
    (fmt(1, 1, 8000, 12)[:14] + struct.pack("<H", 12), "12-bit PCM"),
    (fmt(3, 1, 8000, 16), "16-bit float"),
    (extensible(2, 1, 8000, 16), "0x0002"),
    (extensible(1, 1, 8000, 16)[:24] + b"\x01" * 16, "sub-format"),
])
def test_unsupported_formats(tmp_path, header, message):
    path = tmp_path / "odd.wav"
    path.write_bytes(riff((b"fmt ", header), (b"data", b"\0" * 64)))
    with pytest.raises(RecordingError, match=message) as caught:
        open_recording(str(path))
    assert "odd.wav" in str(caught.value)


@pytest.mark.parametrize("keep", [6, 20, 30, 44])
def test_truncated_header(tmp_path, keep):
    good = tmp_path / "good.wav"
    wavfile.write(str(good), 1000, np.zeros(10, np.int16))  # 44-byte header, data from byte 44
    cut = tmp_path / "cut.wav"
    cut.write_bytes(good.read_bytes()[:keep - (keep == 44)])
    with pytest.raises(RecordingError, match=r"cut\.wav: truncated header"):
        open_recording(str(cut))
