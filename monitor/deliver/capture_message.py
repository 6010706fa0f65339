"""The `capture` message: a capture recording and what it is, in one payload.

MQTT 3.1.1 (which bandwatch speaks, with paho 1.6 and 2.x alike) has no
message properties, so the description travels inside the payload, ahead of
the file's bytes:

    4 bytes    N, the header's length, unsigned big-endian
    N bytes    the header: UTF-8 JSON (node, time, stream_s, id, events,
               file, seconds, trigger_s, bytes, crc32)
    the rest   the WAV file exactly as written on the board

Binary rather than base64 in JSON: a capture is megabytes, and base64 would
add a third. The reader checks `bytes` and `crc32` (zlib.crc32 of the WAV
bytes) before it trusts the file.

On stdout, where there is no broker, the line names the file instead: the
header plus `path`, never the bytes.
"""

import json
import os
import struct
import zlib
from typing import Any, Dict, Sequence, Tuple

from .payloads import Payload, encode, stamp

_LENGTH = struct.Struct(">I")
MAX_HEADER = 65536  # far above any real header; a larger length is a broken message


class CaptureMessageError(ValueError):
    """A payload that is not a well-formed capture message."""


def capture_notice(node: str, stream_s: float, path: str, meta: Dict[str, Any]) -> Payload:
    """What the pipeline sends when a capture file is written. `meta` is the
    file's own capture metadata (trigger_s, events, seconds)."""
    events: Sequence[Dict[str, Any]] = meta.get("events") or []
    notice = stamp(node, stream_s)
    notice.update(
        id=events[0].get("id") if events else None,
        events=[e.get("id") for e in events],
        file=os.path.basename(path),
        seconds=meta.get("seconds"),
        trigger_s=meta.get("trigger_s"),
        path=path,
    )
    try:
        notice["bytes"] = os.path.getsize(path)
    except OSError:
        notice["bytes"] = None
    return notice


def pack(notice: Payload) -> bytes:
    """Read the file the notice names and make the message; OSError if it is gone."""
    with open(notice["path"], "rb") as fh:
        wav = fh.read()
    header = {k: v for k, v in notice.items() if k != "path"}
    header["bytes"] = len(wav)
    header["crc32"] = zlib.crc32(wav)
    head = encode(header).encode("utf-8")
    return _LENGTH.pack(len(head)) + head + wav


def unpack(data: bytes) -> Tuple[Dict[str, Any], bytes]:
    """The header and the WAV bytes of a message; CaptureMessageError when the
    length, the JSON, the size or the checksum does not hold."""
    if len(data) < _LENGTH.size:
        raise CaptureMessageError(f"{len(data)} bytes, too short for a capture message")
    (n,) = _LENGTH.unpack_from(data)
    if n > MAX_HEADER or _LENGTH.size + n > len(data):
        raise CaptureMessageError(f"header length {n} does not fit a message of {len(data)} bytes")
    try:
        header = json.loads(data[_LENGTH.size:_LENGTH.size + n].decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as exc:
        raise CaptureMessageError(f"the header is not UTF-8 JSON: {exc}") from None
    if not isinstance(header, dict):
        raise CaptureMessageError(f"the header is {type(header).__name__}, not a JSON object")
    wav = data[_LENGTH.size + n:]
    if header.get("bytes") != len(wav):
        raise CaptureMessageError(f"the header says {header.get('bytes')!r} bytes, {len(wav)} arrived")
    if header.get("crc32") != zlib.crc32(wav):
        raise CaptureMessageError(f"crc32 {header.get('crc32')!r} does not match the bytes ({zlib.crc32(wav)})")
    return header, wav
