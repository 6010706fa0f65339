"""Acquisition speed and memory: frame and CSV decoding, WAV reading, replay.

Run from the project root:  python bench/acquisition.py [--minutes 60]

Measures on one core:
  frame decoding   MB/s of frame bytes (3 channels int16, 256 samples a frame)
  CSV decoding     lines/s (3 integer columns, fed in 64 KiB chunks)
  WAV reading      MB/s of a float32 recording read in 0.1 s blocks
  replay memory    peak resident memory of replaying a long recording through
                   the file source against a 1-minute one, each in its own
                   subprocess (3 channels at 25.6 kS/s float32)

The recordings go to a temporary directory that is removed afterwards; the
60-minute one takes about 1.1 GB of disk for the duration.
"""

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time
from typing import Callable, List, Tuple

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from monitor.config import SourceConfig  # noqa: E402
from monitor.acquire.decoders import make_decoder  # noqa: E402
from monitor.acquire.decoders.frame import encode_frame  # noqa: E402
from monitor.acquire.recording import RecordingWriter, open_recording  # noqa: E402

RATE = 25600
CHANNELS = ("x", "y", "z")


def best_of(runs: int, work: Callable[[], None]) -> float:
    """Shortest wall time of `runs` runs (the least disturbed by other load)."""
    best = float("inf")
    for _ in range(runs):
        start = time.perf_counter()
        work()
        best = min(best, time.perf_counter() - start)
    return best


def bench_frames() -> float:
    rng = np.random.default_rng(1)
    frames = [encode_frame(rng.integers(-2000, 2000, size=(256, 3)), seq) for seq in range(4000)]
    stream = b"".join(frames)
    chunk = 64 * 1024

    def work() -> None:
        decoder = make_decoder("frame", 3)
        got = 0
        for at in range(0, len(stream), chunk):
            got += len(decoder.feed(stream[at : at + chunk]))
        assert got == len(frames), got

    return len(stream) / best_of(5, work) / 1e6


def bench_csv() -> float:
    rng = np.random.default_rng(2)
    values = rng.integers(-30000, 30000, size=(200_000, 3))
    text = "".join(f"{a},{b},{c}\n" for a, b, c in values.tolist()).encode()
    chunk = 64 * 1024

    def work() -> None:
        decoder = make_decoder("csv", 3)
        got = 0
        for at in range(0, len(text), chunk):
            got += sum(d.samples.shape[0] for d in decoder.feed(text[at : at + chunk]))
        assert got == len(values), got

    return len(values) / best_of(3, work)


def write_recording(path: str, seconds: float) -> None:
    rng = np.random.default_rng(3)
    block = rng.normal(0.0, 1.0, size=(RATE, len(CHANNELS)))  # one second, reused
    with RecordingWriter(path, RATE, CHANNELS, "g") as writer:
        whole, rest = divmod(int(round(seconds * RATE)), RATE)
        for _ in range(whole):
            writer.write(block)
        writer.write(block[:rest])


def bench_wav_read(path: str) -> float:
    size = os.path.getsize(path)

    def work() -> None:
        with open_recording(path) as reader:
            for _ in reader.blocks(RATE // 10):
                pass

    return size / best_of(3, work) / 1e6


def replay_peak_mb(path: str) -> Tuple[float, float]:
    """Peak RSS (MB) and seconds of replaying `path` through FileSource in a fresh process."""
    out = subprocess.run([sys.executable, os.path.abspath(__file__), "--replay", path],
                         check=True, capture_output=True, text=True).stdout.split()
    return float(out[0]), float(out[1])


def replay_child(path: str) -> None:
    from monitor.acquire.sources.file import FileSource

    config = SourceConfig(kind="file", sample_rate=0.0, channels=CHANNELS, unit="g", scale=(1.0,) * 3, path=path)
    source = FileSource(config)
    start = time.perf_counter()
    source.open()
    while source.read(1.0) is not None:
        pass
    source.close()
    seconds = time.perf_counter() - start
    print(peak_rss_mb(), seconds)


def peak_rss_mb() -> float:
    """Peak resident memory of this process in MB.

    VmHWM belongs to this program's own address space; ru_maxrss can carry
    the parent's peak over a vfork and exec, so it is only the fallback.
    """
    try:
        with open("/proc/self/status") as status:
            for line in status:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # KiB on Linux


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--minutes", type=float, default=60.0, help="length of the long recording (default 60)")
    parser.add_argument("--replay", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.replay:
        replay_child(args.replay)
        return 0

    rows: List[Tuple[str, str, str, bool]] = []
    mbs = bench_frames()
    rows.append(("frame decoding (3 ch int16, n=256)", f"{mbs:.0f} MB/s", ">= 100 MB/s", mbs >= 100))
    lps = bench_csv()
    rows.append(("CSV decoding (3 columns)", f"{lps:,.0f} lines/s", ">= 200,000 lines/s", lps >= 200_000))
    with tempfile.TemporaryDirectory(prefix="bandwatch-bench-") as tmp:
        short = os.path.join(tmp, "short.wav")
        long = os.path.join(tmp, "long.wav")
        write_recording(short, 60.0)
        start = time.perf_counter()
        write_recording(long, args.minutes * 60.0)
        wrote = time.perf_counter() - start
        size_mb = os.path.getsize(long) / 1e6
        rows.append((f"WAV writing ({args.minutes:g} min, {size_mb:.0f} MB)", f"{size_mb / wrote:.0f} MB/s", "-", True))
        read = bench_wav_read(short)
        rows.append(("WAV reading (float32, 0.1 s blocks)", f"{read:.0f} MB/s", ">= 200 MB/s", read >= 200))
        short_mb, _ = replay_peak_mb(short)
        long_mb, long_s = replay_peak_mb(long)
        rows.append(("replay peak RSS, 1 min", f"{short_mb:.1f} MB", "-", True))
        rows.append((f"replay peak RSS, {args.minutes:g} min", f"{long_mb:.1f} MB",
                     "<= 1 min + 2 MB", long_mb <= short_mb + 2))
        speed = args.minutes * 60.0 / long_s
        rows.append((f"replay speed, {args.minutes:g} min", f"{speed:.0f}x real time", "-", True))

    widths = [max(len(r[i]) for r in rows) for i in range(3)]
    print(f"{'measure'.ljust(widths[0])}  {'measured'.rjust(widths[1])}  {'target'.ljust(widths[2])}  result")
    for name, value, target, ok in rows:
        verdict = "-" if target == "-" else ("PASS" if ok else "MISS")
        print(f"{name.ljust(widths[0])}  {value.rjust(widths[1])}  {target.ljust(widths[2])}  {verdict}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
