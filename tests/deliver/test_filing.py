"""Filing what the collector receives: safe names, nothing outside the output
folder, repeats dropped, the trend CSV from real summaries, spectra that do
not hold together refused."""

import csv
import json
import os
import subprocess
import sys

import numpy as np
import pytest

from monitor.deliver.capture_message import capture_notice, pack
from monitor.config import parse
from monitor.deliver.filing import Filer, Refused, safe_name
from monitor.deliver.payloads import encode
from monitor.acquire.recording import RecordingWriter
from rig import BASE, TONE_BAND, run, scenario

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def files_under(path):
    return sorted(os.path.relpath(os.path.join(d, f), path) for d, _, fs in os.walk(path) for f in fs)


@pytest.mark.parametrize("raw, safe", [
    ("pump-1", "pump-1"),
    ("Pump_2.a", "Pump_2.a"),
    ("pump 1", "pump_1"),
    ("hall:3*?", "hall_3__"),
    ("wäsche", "w_sche"),
    ("..", None),
    (".", None),
    (".hidden", None),
    ("a/b", None),
    ("/etc", None),
    ("a\\b", None),
    ("x\x00y", None),
    ("", None),
    ("n" * 101, None),
    ("n" * 100, "n" * 100),
    (7, None),
    (None, None),
])
def test_safe_name(raw, safe):
    # A choice of this project (README, collecting): refuse what could leave
    # the folder or hide, map every other odd character to "_".
    assert safe_name(raw) == safe


@pytest.mark.parametrize("node", ["..", ".", "../..", "a/../../b", "/tmp", "x\x00", "", "n" * 300, "..\\..\\x"])
def test_a_hostile_node_name_writes_nothing_anywhere(tmp_path, node):
    out = tmp_path / "out"
    filer = Filer(str(out))
    before = files_under(tmp_path)
    with pytest.raises(Refused):
        filer.file(node, "event", b'{"id": 1}')
    assert files_under(tmp_path) == before


def test_a_node_folder_that_leads_outside_is_refused(tmp_path):
    out = tmp_path / "out"
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    filer = Filer(str(out))
    os.symlink(str(elsewhere), str(out / "pump-1"))  # planted by someone else
    with pytest.raises(Refused) as err:
        filer.file("pump-1", "event", b'{"id": 1}')
    assert "outside the output folder" in str(err.value)
    assert os.listdir(elsewhere) == []


def test_events_are_filed_once_across_restarts(tmp_path):
    out = str(tmp_path / "out")
    first = Filer(out)
    assert first.file("pump-1", "event", b'{"id": 1, "name": "1x"}')
    assert first.file("pump-1", "event", b'{"id": 1, "name": "1x"}') is None  # a QoS 1 repeat
    again = Filer(out)  # a restarted collector reads what it has
    assert again.file("pump-1", "event", b'{"id": 1, "name": "1x"}') is None
    assert again.file("pump-1", "event", b'{"id": 2, "name": "1x"}')
    lines = open(os.path.join(out, "pump-1", "events.jsonl")).read().splitlines()
    assert [json.loads(line)["id"] for line in lines] == [1, 2]
    for bad in (b'{"id": "1"}', b'{"id": -1}', b'{"id": true}', b"[1]", b"\xff", b'{"id": 3, "v": NaN}'):
        with pytest.raises(Refused):
            again.file("pump-1", "event", bad)


def test_the_trend_has_one_row_per_value_of_each_summary(tmp_path):
    config = parse(BASE + TONE_BAND)
    _, sink = run(config, scenario(25.0, [(10.0, 2.0)]))
    summaries = sink.of("summary")
    filer = Filer(str(tmp_path))
    for summary in summaries:
        filer.file("rig-1", "summary", encode(summary).encode())
    with open(tmp_path / "rig-1" / "trend.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    per = 1 + 7 * 2 + len(summaries[0]["bands"])  # speed, 7 values for each of 2 channels, the bands
    assert len(rows) == per * len(summaries)
    last = summaries[-1]
    got = {(r["kind"], r["name"], r["channel"]): r for r in rows if float(r["stream_s"]) == last["stream_s"]}
    assert float(got[("channel", "velocity_rms", "x")]["value"]) == last["channels"]["x"]["velocity_rms"]
    assert got[("channel", "velocity_rms", "x")]["unit"] == "mm/s"
    assert got[("channel", "rms", "y")]["unit"] == "m/s2"
    band = last["bands"][0]
    row = got[("band", band["name"], band["channel"])]
    assert (float(row["value"]), row["unit"], row["level"]) == (band["value"], band["unit"], band["level"])
    assert got[("speed", "speed_hz", "")]["value"] == repr(last["speed_hz"])


def spectrum(**over):
    payload = {"node": "pump-1", "time": "2024-03-01T10:15:00.250Z", "stream_s": 12.5, "id": 4, "events": [],
               "bin_hz": 1.25, "size": 8, "window": "hann", "averages": 4, "unit": "g", "lines": 5,
               "top_hz": 5.0, "speed_hz": None, "bands": [],
               "channels": {"x": [0, 1e-4, 2.5e-3, None, 1], "y": [1, 2, 3, 4, 5]}}
    payload.update(over)
    return json.dumps(payload).encode()


def test_a_spectrum_is_filed_as_npz_with_its_description(tmp_path):
    filer = Filer(str(tmp_path))
    path = filer.file("pump-1", "spectrum", spectrum())
    assert os.path.relpath(path, tmp_path) == os.path.join("pump-1", "spectra",
                                                           "pump-1-20240301T101500.250Z-event4.npz")
    with np.load(path) as z:
        assert z["freqs_hz"].tolist() == [0.0, 1.25, 2.5, 3.75, 5.0]
        assert z["rms"][0, :3].tolist() == [0.0, 1e-4, 2.5e-3] and np.isnan(z["rms"][0, 3])
        assert z["channels"].tolist() == ["x", "y"]
        assert json.loads(z["meta"].item())["window"] == "hann"
    assert filer.file("pump-1", "spectrum", spectrum()) is None  # a repeat
    interval = filer.file("pump-1", "spectrum", spectrum(id=None, time="2024-03-01T10:16:00.000Z"))
    assert interval.endswith("pump-1-20240301T101600.000Z-interval.npz")


@pytest.mark.parametrize("over", [
    {"bin_hz": 0}, {"bin_hz": "1.25"}, {"channels": {}}, {"channels": {"x": [1, 2], "y": [1]}},
    {"channels": {"x": [1, "2"]}}, {"channels": {"../x": [1]}}, {"channels": {"x": [True]}},
    {"id": "4"}, {"id": -4},
])
def test_a_spectrum_that_does_not_hold_together_is_refused(tmp_path, over):
    filer = Filer(str(tmp_path))
    with pytest.raises(Refused):
        filer.file("pump-1", "spectrum", spectrum(**over))
    assert files_under(tmp_path) == []


def test_a_capture_is_named_by_node_time_and_event_never_by_its_header(tmp_path):
    board = tmp_path / "board"
    board.mkdir()
    wav = board / "../../../../etc/cron.d/evil.wav"  # never created: only the name travels
    real = board / "c.wav"
    with RecordingWriter(str(real), 1024.0, ["x"], "g") as w:
        w.write(np.zeros((64, 1)))
    notice = capture_notice("pump-1", 3.0, str(real), {"events": [{"id": 9}]})
    notice["file"] = str(wav)
    notice["time"] = "2024-03-01T10:15:00.250Z"
    out = tmp_path / "out"
    filer = Filer(str(out))
    path = filer.file("pump-1", "capture", pack(notice))
    assert os.path.relpath(path, out) == os.path.join("pump-1", "captures", "pump-1-20240301T101500.250Z-event9.wav")
    assert open(path, "rb").read() == real.read_bytes()
    (record,) = [json.loads(line) for line in open(out / "pump-1" / "captures.jsonl")]
    assert record["file"] is None and record["filed_as"] == "captures/pump-1-20240301T101500.250Z-event9.wav"
    assert filer.file("pump-1", "capture", pack(notice)) is None  # a repeat
    assert files_under(out) == ["pump-1/captures.jsonl", "pump-1/captures/pump-1-20240301T101500.250Z-event9.wav"]


def test_without_matplotlib_spectra_are_filed_and_the_need_is_logged_once(tmp_path):
    # A None entry in sys.modules makes `import matplotlib` raise ImportError.
    code = ("import sys; sys.modules['matplotlib'] = None\n"
            "import logging; logging.basicConfig(level=logging.INFO)\n"
            "from monitor.deliver.filing import Filer\n"
            "from monitor.commands.spectrum_plot import draw_spectrum\n"
            f"f = Filer({str(tmp_path)!r}, draw=draw_spectrum)\n"
            f"f.file('pump-1', 'spectrum', {spectrum()!r})\n"
            f"f.file('pump-1', 'spectrum', {spectrum(id=5)!r})\n")
    result = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert result.returncode == 0, result.stderr
    assert result.stderr.count("need matplotlib") == 1
    assert "pip install 'bandwatch[plot]'" in result.stderr
    names = os.listdir(tmp_path / "pump-1" / "spectra")
    assert sorted(names) == ["pump-1-20240301T101500.250Z-event4.npz", "pump-1-20240301T101500.250Z-event5.npz"]


def test_limits_drawn_as_the_level_of_one_line():
    from monitor.commands.spectrum_plot import single_line_level

    f = np.array([10.0, 100.0])
    # A sine: acceleration = 2 pi f x velocity = (2 pi f)^2 x displacement
    # (common practice); 1 g = 9.80665 m/s^2 (CGPM 1901).
    assert single_line_level(4.5, "velocity", "m/s2", f) == pytest.approx(4.5e-3 * 2 * np.pi * f)
    assert single_line_level(4.5, "velocity", "g", f) == pytest.approx(4.5e-3 * 2 * np.pi * f / 9.80665)
    assert single_line_level(50.0, "displacement", "m/s2", f) == pytest.approx(50e-6 * (2 * np.pi * f) ** 2)
    assert single_line_level(0.3, "acceleration", "g", f).tolist() == [0.3, 0.3]
    assert single_line_level(0.3, "acceleration", "furlong", f) is None


def test_the_tally_says_what_was_filed():
    from monitor.commands.collect import tally

    assert tally({}) == "filed: nothing"
    assert tally({"event": 3, "spectrum": 4, "spectrum repeated": 1, "refused": 2}) == \
        "filed: event 3, spectrum 4; repeats dropped: spectrum 1; refused 2"
