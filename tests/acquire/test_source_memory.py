"""BytesSource: wire bytes through the stream path (reader thread, decoder,
bounded queue), as `bandwatch bench` uses it. Checked against the samples
that were encoded, exactly, and against the frame format's sequence rule."""

import numpy as np

from monitor.acquire.decoders.frame import encode_frame
from monitor.acquire.sources.memory import BytesSource
from monitor.config import SourceConfig
from sockets import wait_until

RATE = 1000.0


def config() -> SourceConfig:
    return SourceConfig(kind="tcp-server", sample_rate=RATE, channels=("x", "y"), unit="g", scale=(1.0, 1.0))


def read_all(source: BytesSource) -> list:
    source.open()
    try:
        blocks = []
        while not source.ended:
            block = source.read(1.0)
            if block is not None:
                blocks.append(block)
        return blocks
    finally:
        source.close()


def test_every_sample_arrives_in_order_even_past_the_queue_bound():
    # 20 s at 1 kS/s: ten times the queue's two seconds, so the reader must wait for room.
    rng = np.random.default_rng(1)
    samples = rng.integers(-32768, 32767, size=(20_000, 2)).astype(np.int16)
    stream = b"".join(encode_frame(samples[i : i + 100], seq=k) for k, i in enumerate(range(0, len(samples), 100)))
    chunks = [stream[i : i + 777] for i in range(0, len(stream), 777)]  # frames cut anywhere, as a link reads
    blocks = read_all(BytesSource(config(), chunks))
    assert np.array_equal(np.concatenate([b.samples for b in blocks]), samples)
    assert sum(b.lost for b in blocks) == 0
    assert {b.full_scale for b in blocks} == {32767.0}  # int16 frames (the frame format's type 1)


def test_a_sequence_gap_starts_a_block_with_the_loss():
    # Frames 0, 1, then 3: the decoder counts frame 2's 100 samples lost, and
    # no block joins samples across the gap.
    one = np.ones((100, 2), dtype=np.int16)
    stream = encode_frame(one, seq=0) + encode_frame(2 * one, seq=1) + encode_frame(3 * one, seq=3)
    blocks = read_all(BytesSource(config(), [stream]))
    assert [b.lost for b in blocks] == [0, 100]
    assert np.array_equal(blocks[1].samples, 3 * one)


def test_queued_blocks_are_read_as_batches_split_at_gaps_and_timestamp_changes():
    # Each frame its own read, all queued before the first `read`: the frames
    # that follow on without a break come out as one block (bandwatch's
    # choice, README "Sources", up to 0.25 s: 250 samples here); frame 3 is
    # missing (the sequence rule: its 50 samples lost), and from frame 6 on
    # the frames carry timestamps.
    one = np.ones((50, 2), dtype=np.int16)
    frames = [encode_frame(k * one, seq=k) for k in (0, 1, 2, 4, 5)]
    frames += [encode_frame(k * one, seq=k, timestamp_us=1_000_000 + (k - 6) * 50_000) for k in (6, 7)]
    source = BytesSource(config(), frames)
    source.open()
    try:
        assert wait_until(lambda: source.queued == 350, 5.0)
        blocks = [source.read(1.0) for _ in range(3)]
    finally:
        source.close()
    assert [b.samples.shape[0] for b in blocks] == [150, 100, 100]
    assert [b.lost for b in blocks] == [0, 50, 0]
    assert [b.timestamp_us for b in blocks] == [None, None, 1_000_000]  # the batch's first frame's
    assert np.array_equal(np.concatenate([b.samples for b in blocks]),
                          np.concatenate([k * one for k in (0, 1, 2, 4, 5, 6, 7)]))


def test_a_batch_holds_at_most_a_quarter_second():
    # Six gap-free frames of 100 samples at 1 kS/s, all queued: batches stop
    # before they pass 250 samples (0.25 s, bandwatch's choice, README "Sources").
    one = np.ones((100, 2), dtype=np.int16)
    source = BytesSource(config(), [encode_frame(k * one, seq=k) for k in range(6)])
    source.open()
    try:
        assert wait_until(lambda: source.queued == 600, 5.0)
        blocks = [source.read(1.0) for _ in range(3)]
    finally:
        source.close()
    assert [b.samples.shape[0] for b in blocks] == [200, 200, 200]
    assert np.array_equal(np.concatenate([b.samples for b in blocks]), np.concatenate([k * one for k in range(6)]))
