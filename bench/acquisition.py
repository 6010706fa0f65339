"""Acquisition speed and memory: frame and CSV decoding, WAV reading, replay.

Run from the project root:  python bench/acquisition.py [--minutes 60] [--decoding]

Measures on one core:
  frame decoding   MB/s of stream bytes (good frames: 3 channels int16, 256 samples),
                   clean and with hostile bytes between the frames (below); and
                   CPU time per 0.5 s read of a live stream (3 channels int16 at
                   25.6 kS/s in frames of 512 samples: 25 frames, 77 KB a read)
  CSV decoding     lines/s (3 integer columns, fed in 64 KiB chunks)
  WAV reading      MB/s of a float32 recording read in 0.1 s blocks
  replay memory    peak resident memory of replaying a long recording through
                   the file source against a 1-minute one, each in its own
                   subprocess (3 channels at 25.6 kS/s float32)

The hostile streams (invented) put between the good frames: overlapping
headers in range, a sync every 8 bytes, each claiming a 262 KB frame (as one
stream, and as UDP datagrams of about 64.8 KB each); whole frames with a bad
CRC; random bytes; a flood of sync bytes; overlapping headers whose short
claimed frames are all complete with a bad CRC; and overlapping 262 KB claims
running longer than the claim, so every claimed frame completes and fails.
Every good frame must come out. Streams are fed in 64 KiB chunks, datagrams
one at a time. Decoding rates count the process's CPU time, so other load on
the machine skews them less than wall time would.

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
FRAME_N = 256  # samples per channel in each good frame of the decoding streams
LIVE_N = 512  # samples per channel in a frame of the live stream
LIVE_FRAMES = 25  # frames in 0.5 s of it at 25.6 kS/s (a TCP source reads about every 0.5 s)


def best_of(runs: int, work: Callable[[], None], clock: Callable[[], float] = time.perf_counter) -> float:
    """Shortest time of `runs` runs (the least disturbed by other load)."""
    best = float("inf")
    for _ in range(runs):
        start = clock()
        work()
        best = min(best, clock() - start)
    return best


# A header in range (version 1, float32, 16 channels, no timestamp, n = 4096:
# a 262 KB frame) whose sequence field is the start of the next copy.
NESTED = b"\xa7\x4d\x01\x03\x10\x00\x00\x10"
# The same with 1 int16 channel and n = 1: an 18-byte frame, complete at once.
SHORT = b"\xa7\x4d\x01\x01\x01\x00\x01\x00"
CLAIM = 12 + 16 * 4096 * 4 + 4


def frame_streams() -> List[Tuple[str, List[bytes], bool]]:
    """(name, pieces, datagrams): good frames with hostile bytes before each;
    datagrams are fed one piece at a time, marked whole."""
    rng = np.random.default_rng(1)

    def frames(count: int) -> List[bytes]:
        return [encode_frame(rng.integers(-2000, 2000, size=(FRAME_N, 3)), seq) for seq in range(count)]

    def damaged(frame: bytes) -> bytes:
        return frame[:-4] + bytes(b ^ 0xFF for b in frame[-4:])

    nested = [NESTED * ((64_800 - len(f)) // 8) + f for f in frames(100)]
    return [
        ("clean", frames(4000), False),
        ("nested false headers, stream", nested, False),
        ("nested false headers, UDP datagrams", nested, True),
        ("frames with a bad CRC before each", [damaged(f) + f for f in frames(2000)], False),
        ("random bytes, 4 KiB before each", [rng.bytes(4096) + f for f in frames(1000)], False),
        ("sync flood, 4 KiB before each", [b"\xa7\x4d" * 2048 + f for f in frames(1000)], False),
        ("overlapping complete false frames", [SHORT * 512 + f for f in frames(300)], False),
        ("nested headers outlasting their claim", [NESTED * (CLAIM // 8 + 8192) + f for f in frames(4)], False),
    ]


def bench_frames(pieces: List[bytes], datagrams: bool) -> float:
    """MB/s of stream bytes decoded, every good frame coming out (counted in
    samples: a block may hold several frames)."""
    stream = b"".join(pieces)
    chunk = 64 * 1024
    chunks = pieces if datagrams else [stream[at : at + chunk] for at in range(0, len(stream), chunk)]

    def work() -> None:
        decoder = make_decoder("frame", 3)
        got = 0
        for piece in chunks:
            got += sum(block.samples.shape[0] for block in decoder.feed(piece, whole=datagrams))
        assert got == len(pieces) * FRAME_N, got

    return len(stream) / best_of(5, work, time.process_time) / 1e6


def bench_live_reads() -> float:
    """Microseconds of CPU to decode one 0.5 s read of the live stream."""
    rng = np.random.default_rng(4)
    reads = 100
    frames = [encode_frame(rng.integers(-2000, 2000, size=(LIVE_N, 3)), seq) for seq in range(reads * LIVE_FRAMES)]
    chunks = [b"".join(frames[at : at + LIVE_FRAMES]) for at in range(0, len(frames), LIVE_FRAMES)]

    def work() -> None:
        decoder = make_decoder("frame", 3)
        got = 0
        for piece in chunks:
            got += sum(block.samples.shape[0] for block in decoder.feed(piece))
        assert got == len(frames) * LIVE_N, got

    return best_of(5, work, time.process_time) / reads * 1e6


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
    parser.add_argument("--decoding", action="store_true", help="measure decoding only (no recordings)")
    parser.add_argument("--replay", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.replay:
        replay_child(args.replay)
        return 0

    rows: List[Tuple[str, str, str, bool]] = []
    for name, pieces, datagrams in frame_streams():
        mbs = bench_frames(pieces, datagrams)
        rows.append((f"frame decoding, {name}", f"{mbs:.0f} MB/s", ">= 100 MB/s", mbs >= 100))
    per_read = bench_live_reads()
    rows.append(("frame decoding, 0.5 s reads of a live stream", f"{per_read:.0f} us a read", "-", True))
    lps = bench_csv()
    rows.append(("CSV decoding (3 columns)", f"{lps:,.0f} lines/s", ">= 200,000 lines/s", lps >= 200_000))
    if not args.decoding:
        recordings(args.minutes, rows)
    print_rows(rows)
    return 0


def recordings(minutes: float, rows: List[Tuple[str, str, str, bool]]) -> None:
    with tempfile.TemporaryDirectory(prefix="bandwatch-bench-") as tmp:
        short = os.path.join(tmp, "short.wav")
        long = os.path.join(tmp, "long.wav")
        write_recording(short, 60.0)
        start = time.perf_counter()
        write_recording(long, minutes * 60.0)
        wrote = time.perf_counter() - start
        size_mb = os.path.getsize(long) / 1e6
        rows.append((f"WAV writing ({minutes:g} min, {size_mb:.0f} MB)", f"{size_mb / wrote:.0f} MB/s", "-", True))
        read = bench_wav_read(short)
        rows.append(("WAV reading (float32, 0.1 s blocks)", f"{read:.0f} MB/s", ">= 200 MB/s", read >= 200))
        short_mb, _ = replay_peak_mb(short)
        long_mb, long_s = replay_peak_mb(long)
        rows.append(("replay peak RSS, 1 min", f"{short_mb:.1f} MB", "-", True))
        rows.append((f"replay peak RSS, {minutes:g} min", f"{long_mb:.1f} MB",
                     "<= 1 min + 2 MB", long_mb <= short_mb + 2))
        speed = minutes * 60.0 / long_s
        rows.append((f"replay speed, {minutes:g} min", f"{speed:.0f}x real time", "-", True))


def print_rows(rows: List[Tuple[str, str, str, bool]]) -> None:
    widths = [max(len(r[i]) for r in rows) for i in range(3)]
    print(f"{'measure'.ljust(widths[0])}  {'measured'.rjust(widths[1])}  {'target'.ljust(widths[2])}  result")
    for name, value, target, ok in rows:
        verdict = "-" if target == "-" else ("PASS" if ok else "MISS")
        print(f"{name.ljust(widths[0])}  {value.rjust(widths[1])}  {target.ljust(widths[2])}  {verdict}")


if __name__ == "__main__":
    sys.exit(main())
