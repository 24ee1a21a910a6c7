"""The single-producer/single-consumer frame ring."""

import threading
import tracemalloc

import numpy as np
import pytest

from agent.ring import Ring


def test_frames_come_out_in_order_across_the_wrap():
    ring = Ring(10, 2, dtype=np.int16)
    a = np.arange(14, dtype=np.int16).reshape(7, 2)
    assert ring.write(a) == 7
    out = np.zeros((5, 2))
    assert ring.read_into(out, timeout_s=0) == 5
    np.testing.assert_array_equal(out, a[:5])
    b = np.arange(100, 116, dtype=np.int16).reshape(8, 2)   # wraps around the end
    assert ring.write(b) == 8
    out = np.zeros((10, 2))
    assert ring.read_into(out, timeout_s=0) == 10
    np.testing.assert_array_equal(out, np.concatenate([a[5:], b]))
    assert ring.frames_written == 15 and ring.available == 0


def test_int16_and_int32_samples_are_stored_bit_exact():
    ring = Ring(4, 1, dtype=np.int32)
    x = np.array([[-2**31], [2**31 - 1], [-1], [12345678]], dtype=np.int32)
    ring.write(x)
    out = np.zeros((4, 1), dtype=np.int32)
    ring.read_into(out, timeout_s=0)
    np.testing.assert_array_equal(out, x)


def test_overrun_drops_the_newest_frames_and_counts_them():
    ring = Ring(8, 1)
    assert ring.write(np.arange(6, dtype=np.float32).reshape(6, 1)) == 6
    assert ring.write(np.arange(6, 11, dtype=np.float32).reshape(5, 1)) == 2
    assert ring.overruns == 1 and ring.frames_dropped == 3
    assert ring.write(np.ones((1, 1), dtype=np.float32)) == 0
    assert ring.overruns == 2 and ring.frames_dropped == 4
    out = np.zeros((8, 1))
    assert ring.read_into(out, timeout_s=0) == 8
    np.testing.assert_array_equal(out[:, 0], [0, 1, 2, 3, 4, 5, 6, 7])  # oldest kept


def test_timeout_returns_what_is_there_and_close_wakes_the_reader():
    ring = Ring(16, 1)
    ring.write(np.ones((3, 1), dtype=np.float32))
    out = np.zeros((8, 1))
    assert ring.read_into(out, timeout_s=0.0) == 3
    got = []
    t = threading.Thread(target=lambda: got.append(ring.read_into(np.zeros((8, 1)))))
    t.start()
    ring.write(np.ones((2, 1), dtype=np.float32))
    ring.close()
    t.join(10)
    assert not t.is_alive() and got == [2]


def test_reader_blocks_until_a_producer_thread_has_written_enough():
    ring = Ring(64, 2)
    total = 5000
    src = np.arange(total * 2, dtype=np.float32).reshape(total, 2)

    def produce():
        i = 0
        while i < total:
            k = min(37, total - i)
            if ring.capacity_frames - ring.available >= k:
                ring.write(src[i:i + k])
                i += k
            else:
                with ring._cond:  # wait for the consumer rather than spin (test only)
                    ring._cond.wait(0.01)

    t = threading.Thread(target=produce)
    t.start()
    out = np.zeros((total, 2))
    done = 0
    while done < total:
        done += ring.read_into(out[done:done + 25], timeout_s=10)  # 25 < 64 - 37: never starves
    t.join(10)
    np.testing.assert_array_equal(out, src)
    assert ring.overruns == 0


def test_discard_empties_without_touching_counters():
    ring = Ring(8, 1)
    ring.write(np.ones((5, 1), dtype=np.float32))
    assert ring.discard() == 5 and ring.available == 0
    assert ring.frames_written == 5 and ring.overruns == 0


def test_no_memory_growth_over_thousands_of_writes_and_reads():
    ring = Ring(4096, 2, dtype=np.int16)
    block = np.ones((441, 2), dtype=np.int16)
    out = np.zeros((441, 2))
    for _ in range(50):  # warm up caches of numpy and the interpreter
        ring.write(block)
        ring.read_into(out, timeout_s=0)
    tracemalloc.start()
    try:
        base, _ = tracemalloc.get_traced_memory()
        for _ in range(5000):
            ring.write(block)
            ring.write(block)
            ring.read_into(out, timeout_s=0)
        grown, _ = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert ring.overruns > 0  # the ring filled up and kept refusing the newest frames
    assert grown - base < 4096  # bytes: a few small objects at most, nothing per call


def test_bad_arguments_raise():
    with pytest.raises(ValueError, match="capacity_frames"):
        Ring(0, 1)
    with pytest.raises(ValueError, match="channels"):
        Ring(4, 0)
    ring = Ring(4, 2)
    with pytest.raises(ValueError, match="out.shape"):
        ring.read_into(np.zeros((4, 3)))
    with pytest.raises(ValueError, match="timeout_s"):
        ring.read_into(np.zeros((4, 2)), timeout_s=-1)
