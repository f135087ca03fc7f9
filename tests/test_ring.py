"""The single-producer / single-consumer float32 ring (liveshape.rigs.ring).

The reference is the definition of a FIFO queue: whatever is written comes out in the same order,
nothing is lost unless the writer was told it did not fit, and nothing is invented.
"""

from __future__ import annotations

import sys
import threading

import numpy as np
import pytest

from liveshape.rigs.ring import FloatRing


def test_tiny_write_read_exact() -> None:
    ring = FloatRing(4)
    assert (ring.capacity, ring.available, ring.free) == (4, 0, 4)
    assert ring.write(np.array([1, 2, 3], np.float32)) == 3
    out = np.full(2, -1.0, np.float32)
    assert ring.read_into(out) == 2
    assert out.tolist() == [1.0, 2.0]
    # wraps around the end of the buffer
    assert ring.write(np.array([4, 5, 6], np.float32)) == 3
    assert (ring.available, ring.free) == (4, 0)
    assert ring.read(10).tolist() == [3.0, 4.0, 5.0, 6.0]
    assert ring.available == 0


def test_write_beyond_capacity_is_truncated_and_reported() -> None:
    ring = FloatRing(3)
    assert ring.write(np.arange(5, dtype=np.float32)) == 3
    assert ring.write(np.ones(1, np.float32)) == 0
    assert ring.read(5).tolist() == [0.0, 1.0, 2.0]


def test_read_from_empty_leaves_output_untouched() -> None:
    ring = FloatRing(3)
    out = np.full(3, 7.0, np.float32)
    assert ring.read_into(out) == 0
    assert out.tolist() == [7.0, 7.0, 7.0]
    ring.write(np.array([1.0], np.float32))
    assert ring.read_into(out) == 1
    assert out.tolist() == [1.0, 7.0, 7.0]


def test_multichannel_frames_and_shape_checks() -> None:
    ring = FloatRing(5, channels=2)
    data = np.arange(8, dtype=np.float32).reshape(4, 2)
    assert ring.write(data) == 4
    got = ring.read(3)
    assert got.shape == (3, 2)
    np.testing.assert_array_equal(got, data[:3])
    with pytest.raises(ValueError):
        ring.write(np.zeros(3, np.float32))  # 1-D into a 2-channel ring
    with pytest.raises(ValueError):
        ring.write(np.zeros((3, 3), np.float32))
    with pytest.raises(ValueError):
        FloatRing(0)


def test_peek_skip_and_zeros() -> None:
    ring = FloatRing(4)
    ring.write(np.array([1, 2, 3], np.float32))
    out = np.zeros(2, np.float32)
    assert ring.peek_into(out) == 2 and out.tolist() == [1.0, 2.0]
    assert ring.available == 3
    assert ring.skip(2) == 2
    assert ring.write_zeros(5) == 3
    assert ring.read(4).tolist() == [3.0, 0.0, 0.0, 0.0]
    assert (ring.frames_written, ring.frames_read) == (6, 6)


@pytest.mark.parametrize("capacity", [1, 7, 64, 1000])
def test_random_chunks_round_trip(capacity: int) -> None:
    """Any interleaving of chunk sizes delivers exactly the written sequence (FIFO definition)."""
    rng = np.random.default_rng(capacity)
    source = rng.standard_normal(20_000).astype(np.float32)
    ring = FloatRing(capacity)
    got: list[np.ndarray] = []
    pos = 0
    while pos < source.size or ring.available:
        n_w = int(rng.integers(0, 2 * capacity + 2))
        pos += ring.write(source[pos : pos + n_w])
        got.append(ring.read(int(rng.integers(0, 2 * capacity + 2))))
    np.testing.assert_array_equal(np.concatenate(got), source)


def test_two_threads_without_locks_deliver_everything_in_order() -> None:
    """A producer and a consumer thread hammering the ring never lose, repeat or reorder data."""
    n_total = 60_000
    source = np.arange(n_total, dtype=np.float32)  # float32 is exact for integers < 2**24
    ring = FloatRing(257)
    received = np.full(n_total, -1.0, np.float32)
    errors: list[BaseException] = []

    def producer() -> None:
        rng = np.random.default_rng(1)
        pos = 0
        try:
            while pos < n_total:
                pos += ring.write(source[pos : pos + int(rng.integers(1, 300))])
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)

    def consumer() -> None:
        rng = np.random.default_rng(2)
        pos = 0
        block = np.zeros(300, np.float32)
        try:
            while pos < n_total:
                k = ring.read_into(block[: int(rng.integers(1, 300))])
                received[pos : pos + k] = block[:k]
                pos += k
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=producer), threading.Thread(target=consumer)]
    old_interval = sys.getswitchinterval()
    sys.setswitchinterval(1e-5)  # switch often so the two sides really interleave
    try:
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=60)
    finally:
        sys.setswitchinterval(old_interval)
    assert not errors
    np.testing.assert_array_equal(received, source)


def test_block_records_are_reexported_from_ring() -> None:
    # BlockIO, Recording and BufferSource live in rigs.blocks; rigs.ring keeps them importable
    from liveshape.rigs import blocks, ring

    for name in ("BlockIO", "Recording", "BufferSource"):
        assert getattr(ring, name) is getattr(blocks, name)
