"""Spectrum payloads: sent with every band rise and on the interval, the
monitor's own spectrum to 4 significant digits, held against scipy.signal.welch,
and small enough for the broker (under 64 kB for 3 channels of 2049 lines)."""

import json

import numpy as np
import pytest
import scipy.signal

from monitor.config import parse
from monitor.deliver.payloads import Lines, encode
from monitor.deliver.spectrum_payload import line_count
from rig import BASE, FS, TONE_BAND, run

RISE = TONE_BAND + """[[band]]
name = "vel"
channel = "y"
hz = [20.0, 200.0]
quantity = "velocity"
warning = 50.0
"""


def step(seconds, at, before=0.2, after=2.0, seed=3):
    """An invented signal: a 50 Hz tone on x whose RMS steps at `at` s, a
    30 Hz tone on y, and a little noise."""
    n = int(seconds * FS)
    t = np.arange(n) / FS
    rms = np.where(t >= at, after, before)
    rng = np.random.default_rng(seed)
    x = rms * np.sqrt(2) * np.sin(2 * np.pi * 50 * t) + rng.normal(0, 0.01, n)
    y = 0.5 * np.sqrt(2) * np.sin(2 * np.pi * 30 * t + 0.3) + rng.normal(0, 0.01, n)
    return np.column_stack([x, y])


def decoded(payload):
    """The payload as a consumer reads it: through JSON."""
    return json.loads(encode(payload))


def test_a_rise_sends_the_spectrum_with_the_events_id_after_its_levels():
    config = parse(BASE + RISE)
    x = step(12.0, 6.0)
    monitor, sink = run(config, x)
    rises = [e for e in sink.of("event") if e["kind"] == "band" and e["previous"] == "normal"]
    assert [e["name"] for e in rises] == ["tone"]
    spectra = sink.of("spectrum")
    assert len(spectra) == 1  # off by default on the interval
    got = decoded(spectra[0])
    assert got["id"] == rises[0]["id"]
    assert got["events"] == [{k: rises[0][k] for k in ("id", "name", "channel", "level", "previous", "value")}]
    assert got["stream_s"] == rises[0]["stream_s"]
    # Order within the result: the event, its levels, then the spectrum.
    order = [s for s, _ in sink.messages]
    at = order.index("spectrum")
    assert order[at - 1] == "levels" and "event" in order[at - 3:at]
    assert (got["size"], got["window"], got["averages"], got["unit"]) == (1024, "hann", 3, "m/s2")
    assert got["bin_hz"] == FS / 1024
    assert got["lines"] == 513 and got["top_hz"] == FS / 2
    rows = {(b["name"], b["channel"]): b for b in got["bands"]}
    assert rows[("tone", "x")]["hz"] == [40.0, 60.0]
    assert rows[("tone", "x")]["level"] == "warning"
    assert rows[("tone", "x")]["limits"] == {"warning": 1.0, "alarm": 3.0}
    assert rows[("vel", "y")]["quantity"] == "velocity" and rows[("vel", "y")]["unit"] == "mm/s"


def test_the_lines_are_welchs_rms_spectrum_to_4_significant_digits():
    # Reference: scipy.signal.welch(scaling="spectrum") over the samples of
    # the result (same window, segment, overlap, detrend="constant") gives
    # the power per line; its square root is the RMS per line.
    config = parse(BASE + RISE + "[evidence]\nspectrum_interval = 5.0\n")
    x = step(12.0, 6.0)
    _, sink = run(config, x)
    got = decoded(sink.of("spectrum")[-1])  # at 10 s, 4 s after the step
    assert got["stream_s"] >= 10.0 and got["id"] is None
    spec = config.spectrum
    end = int(round(got["stream_s"] * FS)) + 1
    _, power = scipy.signal.welch(x[end - spec.span:end].T, FS, window="hann", nperseg=spec.size,
                                  noverlap=spec.size - spec.hop, detrend="constant", scaling="spectrum")
    reference = np.sqrt(power)
    for i, name in enumerate(("x", "y")):
        lines = np.array(got["channels"][name])
        # 4 significant digits: within half a unit of the 4th digit, 5e-4 relative.
        assert lines == pytest.approx(reference[i], rel=5e-4, abs=1e-300)
    # The 50 Hz tone of RMS 2.0 on x sits on line 25 (2 Hz lines): a Hann
    # window's coherent gain is corrected, so the line reads its RMS
    # (common practice).
    assert got["channels"]["x"][25] == pytest.approx(2.0, rel=1e-3)


def test_lines_are_written_as_pythons_4_significant_digit_rounding():
    # Reference: Python's own "%.4g" formatting, read back by float().
    rng = np.random.default_rng(1)
    values = np.concatenate([10.0 ** rng.uniform(-12, 5, 2000), [0.0, 1e-4, 0.00012, 9.9995e-5, 1.0, 12345.6]])
    text = Lines(values).json()
    assert json.loads(text) == [float(f"{v:.4g}") for v in values]
    assert "e-0" not in text and "e+" not in text and "0.000" not in text
    assert json.loads(Lines(np.array([np.nan, np.inf, 1.0])).json()) == [None, None, 1.0]


def _short(value):
    """Python's "%.4g" text of `value`, written as short as JSON allows
    (README, the spectrum message: 1.234e-5, not 1.234e-05; 1.2e-4, not
    0.00012): the short forms are this project's choice."""
    text = f"{value:.4g}"
    sign, body = ("-", text[1:]) if text.startswith("-") else ("", text)
    if body.startswith("0.000"):
        digits = body[5:]
        body = f"{digits[0]}.{digits[1:]}e-4" if len(digits) > 1 else f"{digits}e-4"
    mantissa, _, exponent = body.partition("e")
    return sign + mantissa + (f"e{int(exponent)}" if exponent else "")


def test_lines_at_rounding_ties_and_decade_edges_are_pythons_rounding():
    # Reference: Python's own "%.4g" (the exact binary value rounded to 4
    # digits): every four digits, and at and beside the halfway points of
    # the fourth digit and the powers of ten, in every decade from 1e-10 to 1e4.
    every = np.arange(1000.0, 10000.0)
    some = every[::7]
    rows = []
    for exponent in range(-10, 5):
        unit = 10.0 ** (exponent - 3)
        ties = (some + 0.5) * unit
        power = 10.0 ** exponent
        rows.append(np.concatenate([every * unit, ties, np.nextafter(ties, 0.0), np.nextafter(ties, 1.0),
                                    [power, np.nextafter(power, 0.0), np.nextafter(power, 1.0),
                                     9.9995 * power, 9.9994 * power, 9.9996 * power]]))
    row = np.concatenate(rows)
    row = np.concatenate([row, -row[::25], [0.0, -0.0, 1e300, 5e-324, np.nan, np.inf, -np.inf]])
    text = Lines(row).json()
    assert text == "[" + ",".join("null" if not np.isfinite(v) else _short(v) for v in row.tolist()) + "]"
    assert json.loads(text) == [float(f"{v:.4g}") if np.isfinite(v) else None for v in row.tolist()]


def test_a_3_channel_4096_point_spectrum_stays_under_64_kB():
    # An invented 3-axis sensor in g: tones and broadband noise at levels an
    # industrial accelerometer sees (1e-4 to 1e-1 g per line), all 2049 lines.
    config = parse("""
[node]
name = "size-check"
[source]
kind = "simulator"
sample_rate = 25600.0
channels = ["x", "y", "z"]
realtime = false
[spectrum]
size = 4096
[[band]]
name = "1x"
hz = [20.0, 30.0]
quantity = "velocity"
warning = 0.01
delay = 0.0
""")
    n = config.spectrum.span + 2 * config.spectrum.hop
    t = np.arange(n) / 25600.0
    rng = np.random.default_rng(7)
    x = np.column_stack([0.05 * np.sin(2 * np.pi * 24.7 * t) + rng.normal(0, 0.003, n) for _ in range(3)])
    _, sink = run(config, x)
    spectra = sink.of("spectrum")
    assert spectra and spectra[0]["lines"] == 2049
    text = encode(spectra[0])
    assert len(text.encode("utf-8")) < 64 * 1024, len(text)


def test_spectra_on_the_interval_and_only_there_when_rises_are_off():
    config = parse(BASE + RISE + "[evidence]\nspectrum_interval = 2.0\nspectrum_on_rise = false\n"
                   "spectrum_top_hz = 100.0\n")
    _, sink = run(config, step(12.0, 6.0))
    spectra = [decoded(p) for p in sink.of("spectrum")]
    assert all(p["id"] is None and p["events"] == [] for p in spectra)
    # The first result (like summaries), then the first result at or after
    # each multiple of 2 s: hops are 0.125 s apart.
    stamps = [p["stream_s"] for p in spectra]
    assert len(stamps) == 6
    assert all(2.0 * k <= s < 2.0 * k + 0.125 for k, s in zip(range(1, 6), stamps[1:]))
    # Lines up to 100 Hz: 0..100 in 2 Hz steps.
    assert spectra[0]["lines"] == 51 and spectra[0]["top_hz"] == 100.0
    assert len(spectra[0]["channels"]["x"]) == 51


def test_line_count_follows_the_top_frequency():
    assert line_count(4096, 1.25, None) == 2049
    assert line_count(4096, 1.25, 1000.0) == 801
    assert line_count(4096, 1.25, 1000.6) == 801
    assert line_count(4096, 1.25, 0.1) == 1
    assert line_count(4096, 1.25, 1e9) == 2049


def test_no_spectrum_without_a_rise_or_interval():
    config = parse(BASE + RISE)
    _, sink = run(config, step(8.0, 100.0))  # never steps: no rise
    assert sink.of("spectrum") == []
