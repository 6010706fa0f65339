"""Filing what the collector receives, inside one output folder.

Per node, under OUT/<node>/:

    events.jsonl       every event once (a repeat of an id is dropped), as received
    trend.csv          every summary, one row per value: time, stream_s, kind,
                       name, channel, value, unit, level
    spectra/           <node>-<time>-event<id>.npz (or -interval.npz) and .png
    captures/          <node>-<time>-event<id>.wav
    captures.jsonl     each capture's header, with the name it was filed as

Everything from the wire is untrusted: the node name (a topic level), the
names inside payloads, and the file name a capture's header gives. A name
is refused when it is empty, longer than `NAME_MAX` bytes, holds NUL, `/`
or `\\`, or starts with `.` (so `.` and `..` too); otherwise every
character outside A-Z a-z 0-9 . _ - becomes `_`. Files are named by the
collector from such names, the checked time stamp and the integer event id,
never by a name off the wire, and every path is checked to resolve inside
the output folder before anything is written. A message that fails a check
is refused whole and logged.

Files are written whole (a temporary name, fsync, rename) and lines are
synced before the message is acknowledged to the broker, so a crash never
leaves half a file and never loses what the broker thinks was delivered.
"""

import csv
import io
import json
import logging
import os
import re
import datetime as _dt
from typing import Any, Callable, Dict, List, Optional, Set, Tuple

import numpy as np

from .capture_message import CaptureMessageError, unpack
from .payloads import encode

log = logging.getLogger("bandwatch.collect")

NAME_MAX = 100  # bytes; node and band names are at most 64 characters
MAX_LINES = 65537  # a 131072-point spectrum
MAX_CHANNELS = 64
LEVELS = ("normal", "warning", "alarm", "fault")
TREND_FIELDS = ("time", "stream_s", "kind", "name", "channel", "value", "unit", "level")
# Per-channel summary values and their units ("" for the source unit's ratios).
_STATS = (("rms", None), ("peak", None), ("crest", ""), ("kurtosis", ""), ("velocity_rms", "mm/s"),
          ("dominant_hz", "Hz"), ("dominant_rms", None))
_UNSAFE = re.compile(r"[^A-Za-z0-9._-]")
_TIME = re.compile(r"^(\d{4})-(\d\d)-(\d\d)T(\d\d):(\d\d):(\d\d)\.(\d{3})Z\Z")
PLOT_HINT = "pip install 'bandwatch[plot]'"
# draw(path, meta, freqs_hz, rms, channels): a picture of one spectrum; may
# raise ImportError when what it draws with is missing.
Draw = Callable[[str, Dict[str, Any], np.ndarray, np.ndarray, List[str]], None]


class Refused(ValueError):
    """A message that fails a check; nothing of it is written."""


def safe_name(raw: Any) -> Optional[str]:
    """`raw` as a file name part, or None when it must be refused (see the
    module's rules)."""
    if not isinstance(raw, str) or not raw or len(raw.encode("utf-8", "replace")) > NAME_MAX:
        return None
    if "\x00" in raw or "/" in raw or "\\" in raw or raw.startswith("."):
        return None
    return _UNSAFE.sub("_", raw)


def _name(raw: Any, what: str) -> str:
    name = safe_name(raw)
    if name is None:
        raise Refused(f"{what} {_show(raw)} is not a safe name")
    return name


def _show(raw: Any) -> str:
    text = repr(raw)
    return text if len(text) <= 80 else text[:77] + "..."


def _number(value: Any) -> Optional[float]:
    """A finite JSON number, else None."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    value = float(value)
    return value if np.isfinite(value) else None


def _event_id(value: Any, what: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise Refused(f"{what} {_show(value)} is not an event id")
    return value


def _stamp(raw: Any) -> str:
    """The payload's UTC time as a file name part, 20240301T101500.250Z;
    the collector's own clock when the payload's is not in the usual form."""
    m = _TIME.match(raw) if isinstance(raw, str) else None
    if m:
        return "{}{}{}T{}{}{}.{}Z".format(*m.groups())
    now = _dt.datetime.now(_dt.timezone.utc)
    return now.strftime("%Y%m%dT%H%M%S.") + f"{now.microsecond // 1000:03d}Z"


def _json_object(data: bytes, what: str) -> Dict[str, Any]:
    try:
        payload = json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as exc:
        raise Refused(f"the {what} is not UTF-8 JSON: {exc}") from None
    if not isinstance(payload, dict):
        raise Refused(f"the {what} is {type(payload).__name__}, not a JSON object")
    return payload


class Filer:
    """Files messages under `root`. `file` takes one message; `counts` says
    how many of each kind were filed, repeated or refused. With `draw`, each
    spectrum also gets a PNG beside its npz."""

    def __init__(self, root: str, draw: Optional[Draw] = None) -> None:
        self.root = os.path.abspath(root)
        self._real_root = os.path.realpath(self.root)
        self.draw = draw
        self._seen: Dict[str, Set[int]] = {}
        self.counts: Dict[str, int] = {}
        os.makedirs(self.root, exist_ok=True)

    # -- entry -------------------------------------------------------------

    def file(self, node: Any, suffix: str, data: bytes) -> Optional[str]:
        """File one message that came on `{prefix}/{node}/{suffix}`; returns the
        path written, or None for a repeat. Raises Refused."""
        name = _name(node, "node name")
        handler = {"event": self._event, "summary": self._summary, "spectrum": self._spectrum,
                   "capture": self._capture}.get(suffix)
        if handler is None:
            raise Refused(f"topic suffix {_show(suffix)} is not filed")
        path = handler(name, data)
        key = suffix if path is not None else f"{suffix} repeated"
        self.counts[key] = self.counts.get(key, 0) + 1
        return path

    def refused(self) -> None:
        self.counts["refused"] = self.counts.get("refused", 0) + 1

    # -- paths and writing -------------------------------------------------

    def _path(self, node: str, *parts: str) -> str:
        """A path under root/node, checked to resolve inside root; folders made."""
        path = os.path.join(self.root, node, *parts)
        real = os.path.realpath(path)
        if os.path.commonpath([real, self._real_root]) != self._real_root or real == self._real_root:
            raise Refused(f"{_show(path)} would lie outside the output folder {self.root}")
        os.makedirs(os.path.dirname(path), exist_ok=True)
        return path

    @staticmethod
    def _write_whole(path: str, data: bytes) -> None:
        part = path + ".part"
        with open(part, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(part, path)
        _sync_folder(os.path.dirname(path))

    @staticmethod
    def _append(path: str, text: str, header: str = "") -> None:
        with open(path, "a", encoding="utf-8", newline="") as fh:
            if header and fh.tell() == 0:
                fh.write(header)
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())

    # -- events ------------------------------------------------------------

    def _event(self, node: str, data: bytes) -> Optional[str]:
        payload = _json_object(data, "event")
        event_id = _event_id(payload.get("id"), "event id")
        path = self._path(node, "events.jsonl")
        seen = self._seen_ids(node, path)
        if event_id in seen:
            return None  # QoS 1 may deliver twice (README, Delivery)
        try:
            line = encode(payload)
        except ValueError as exc:  # NaN or infinity in the JSON
            raise Refused(f"event {event_id}: {exc}") from None
        self._append(path, line + "\n")
        seen.add(event_id)
        log.info("%s: event %d %s/%s %s", node, event_id, _show(payload.get("name")),
                 _show(payload.get("channel")), _show(payload.get("level")))
        return path

    def _seen_ids(self, node: str, path: str) -> Set[int]:
        """The ids already in the node's events.jsonl, read once."""
        if node not in self._seen:
            seen: Set[int] = set()
            try:
                with open(path, encoding="utf-8", errors="replace") as fh:
                    for line in fh:
                        try:
                            seen.add(int(json.loads(line)["id"]))
                        except (ValueError, KeyError, TypeError):
                            continue  # a line cut short by a crash
            except FileNotFoundError:
                pass
            self._seen[node] = seen
        return self._seen[node]

    # -- summaries ---------------------------------------------------------

    def _summary(self, node: str, data: bytes) -> Optional[str]:
        payload = _json_object(data, "summary")
        time = payload.get("time") if isinstance(payload.get("time"), str) and _TIME.match(payload["time"]) else ""
        stream_s = _number(payload.get("stream_s"))
        rows: List[Tuple[Any, ...]] = [("speed", "speed_hz", "", _number(payload.get("speed_hz")), "Hz", "")]
        channels = payload.get("channels")
        if isinstance(channels, dict):
            for channel, stats in channels.items():
                if not isinstance(stats, dict) or safe_name(channel) is None:
                    continue
                unit = _unit(stats.get("unit"))
                for key, key_unit in _STATS:
                    rows.append(("channel", key, safe_name(channel), _number(stats.get(key)),
                                 unit if key_unit is None else key_unit, ""))
        bands = payload.get("bands")
        for band in bands if isinstance(bands, list) else []:
            if not isinstance(band, dict) or safe_name(band.get("name")) is None:
                continue
            channel = safe_name(band.get("channel")) or ""
            level = band.get("level") if band.get("level") in LEVELS else ""
            rows.append(("band", safe_name(band.get("name")), channel, _number(band.get("value")),
                         _unit(band.get("unit")), level))
        out = io.StringIO()
        writer = csv.writer(out, lineterminator="\n")
        for kind, name, channel, value, unit, level in rows:
            writer.writerow((time, "" if stream_s is None else repr(stream_s), kind, name, channel,
                             "" if value is None else repr(value), unit, level))
        path = self._path(node, "trend.csv")
        self._append(path, out.getvalue(), header=",".join(TREND_FIELDS) + "\n")
        return path

    # -- spectra -----------------------------------------------------------

    def _spectrum(self, node: str, data: bytes) -> Optional[str]:
        payload = _json_object(data, "spectrum")
        freqs, rms, channels = spectrum_arrays(payload)
        event = payload.get("id")
        tail = "interval" if event is None else f"event{_event_id(event, 'spectrum id')}"
        base = f"{node}-{_stamp(payload.get('time'))}-{tail}"
        path = self._path(node, "spectra", base + ".npz")
        if os.path.exists(path):
            return None
        meta = {k: v for k, v in payload.items() if k != "channels"}
        meta["node"] = node
        buffer = io.BytesIO()
        np.savez(buffer, freqs_hz=freqs, rms=rms, channels=np.array(channels),
                 meta=np.array(json.dumps(meta, ensure_ascii=False)))
        self._write_whole(path, buffer.getvalue())
        log.info("%s: spectrum %s (%d channel(s), %d lines)", node, base, rms.shape[0], rms.shape[1])
        self._picture(path[:-4] + ".png", meta, freqs, rms, channels)
        return path

    def _picture(self, path: str, meta: Dict[str, Any], freqs: np.ndarray, rms: np.ndarray,
                 channels: List[str]) -> None:
        if self.draw is None:
            return
        try:
            self.draw(path + ".part", meta, freqs, rms, channels)
            os.replace(path + ".part", path)
        except ImportError:
            log.warning("spectra are filed without PNG pictures: they need matplotlib (%s)", PLOT_HINT)
            self.draw = None  # said once
        except Exception as exc:  # noqa: BLE001 - the data is filed; a picture is a convenience
            log.error("cannot draw %s: %s", path, exc)

    # -- captures ----------------------------------------------------------

    def _capture(self, node: str, data: bytes) -> Optional[str]:
        try:
            header, wav = unpack(data)
        except CaptureMessageError as exc:
            raise Refused(f"capture: {exc}") from None
        event = _event_id(header.get("id"), "capture id")
        if wav[:4] != b"RIFF" or wav[8:12] != b"WAVE":
            raise Refused("the capture's bytes are not a WAV file")
        name = f"{node}-{_stamp(header.get('time'))}-event{event}.wav"
        path = self._path(node, "captures", name)
        if os.path.exists(path):
            return None
        self._write_whole(path, wav)
        record = {k: v for k, v in header.items() if k != "file"}
        record["file"] = safe_name(header.get("file"))  # the board's name, for reference only
        record["filed_as"] = f"captures/{name}"
        try:
            line = encode(record)
        except ValueError:
            line = encode({"id": event, "filed_as": record["filed_as"]})
        self._append(self._path(node, "captures.jsonl"), line + "\n")
        log.info("%s: capture %s (%d bytes)", node, name, len(wav))
        return path


def _unit(raw: Any) -> str:
    """A unit for the CSV: short, of harmless characters."""
    if not isinstance(raw, str):
        return ""
    return re.sub(r"[^A-Za-z0-9/_.-]", "_", raw[:16])


def spectrum_arrays(payload: Dict[str, Any]) -> Tuple[np.ndarray, np.ndarray, List[str]]:
    """Frequencies, RMS per line (channels, lines) and channel names of a
    spectrum payload; Refused when it does not hold together."""
    bin_hz = _number(payload.get("bin_hz"))
    if bin_hz is None or bin_hz <= 0:
        raise Refused(f"spectrum bin_hz {_show(payload.get('bin_hz'))} is not a positive number")
    channels = payload.get("channels")
    if not isinstance(channels, dict) or not 1 <= len(channels) <= MAX_CHANNELS:
        raise Refused("spectrum channels is not an object of 1 to 64 channels")
    names = [_name(k, "channel name") for k in channels]
    rows = list(channels.values())
    n = len(rows[0]) if isinstance(rows[0], list) else -1
    if not 1 <= n <= MAX_LINES or any(not isinstance(r, list) or len(r) != n for r in rows):
        raise Refused(f"spectrum lines are not lists of one length from 1 to {MAX_LINES}")
    rms = np.empty((len(rows), n))
    for i, row in enumerate(rows):
        for k, v in enumerate(row):
            if v is None:
                rms[i, k] = np.nan
            elif isinstance(v, bool) or not isinstance(v, (int, float)):
                raise Refused(f"spectrum line {k} of {names[i]} is {_show(v)}, not a number")
            else:
                rms[i, k] = v
    return np.arange(n) * bin_hz, rms, names


def _sync_folder(folder: str) -> None:
    """Make a rename inside `folder` durable."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)
