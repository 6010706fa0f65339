"""The capture message: a length-prefixed JSON header, then the WAV bytes."""

import json
import struct
import zlib

import numpy as np
import pytest

from monitor.deliver.capture_message import CaptureMessageError, capture_notice, pack, unpack
from monitor.acquire.recording import RecordingWriter


@pytest.fixture
def wav(tmp_path):
    path = tmp_path / "pump-1-20240301T101500Z-event7-1x-x.wav"
    with RecordingWriter(str(path), 1024.0, ["x", "y"], "g") as w:
        w.write(np.zeros((512, 2)))
    return str(path)


def test_pack_and_unpack_give_back_the_file_and_its_description(wav):
    notice = capture_notice("pump-1", 12.5, wav, {"trigger_s": 0.25, "seconds": 0.5,
                                                  "events": [{"id": 7}, {"id": 8}]})
    assert notice["path"] == wav and notice["file"] == "pump-1-20240301T101500Z-event7-1x-x.wav"
    data = pack(notice)
    header, body = unpack(data)
    raw = open(wav, "rb").read()
    assert body == raw
    # Reference: the layout read by hand with struct, json and zlib.
    (n,) = struct.unpack(">I", data[:4])
    assert json.loads(data[4:4 + n]) == header and data[4 + n:] == raw
    assert header["crc32"] == zlib.crc32(raw) and header["bytes"] == len(raw)
    assert (header["id"], header["events"], header["trigger_s"], header["seconds"]) == (7, [7, 8], 0.25, 0.5)
    assert "path" not in header  # the board's folders stay on the board


@pytest.mark.parametrize("damage, words", [
    (lambda d: d[:3], "too short"),
    (lambda d: b"\xff\xff\xff\xff" + d[4:], "header length"),
    (lambda d: d[:-1], "bytes"),
    (lambda d: d[:-1] + bytes([d[-1] ^ 1]), "crc32"),
    (lambda d: struct.pack(">I", 2) + b"[]" + d, "not a JSON object"),
    (lambda d: struct.pack(">I", 2) + b"\xff{", "not UTF-8 JSON"),
])
def test_a_damaged_message_is_refused_with_the_reason(wav, damage, words):
    data = pack(capture_notice("pump-1", 1.0, wav, {"events": [{"id": 1}]}))
    with pytest.raises(CaptureMessageError) as err:
        unpack(damage(data))
    assert words in str(err.value)
