"""A preallocated single-producer / single-consumer ring of sample frames.

The producer is a real-time callback (the sound card's audio thread); the
consumer is the capture loop.  The producer must never wait and never grow
memory, so the ring is one array allocated at construction and the producer
only ever moves its own position counter.

Public API
----------
- :class:`Ring` -- ``write(block)`` (producer), ``read_into(out, timeout_s)``
  (consumer, blocking), ``discard()``, ``close()``; counters ``overruns``,
  ``frames_written``, ``frames_dropped``; ``available``.

Overrun policy
--------------
When a block does not fit, the ring keeps what it already holds and drops the
*newest* frames (the part of the incoming block beyond the free space), counts
one overrun event and adds the dropped frames to ``frames_dropped``.  Dropping
the newest frames is the choice that keeps the two sides independent: the
producer never moves the consumer's position, so the consumer never reads a
region that is being overwritten.  The frames the consumer receives are always
contiguous up to the first gap, and the gap is visible in the counters.
"""

from __future__ import annotations

import threading
import time

import numpy as np

__all__ = ["Ring"]


class Ring:
    """Fixed-capacity frame ring for one producer thread and one consumer thread.

    Parameters
    ----------
    capacity_frames : int
        Frames the ring holds (each frame has ``channels`` samples).
    channels : int
        Samples per frame.
    dtype : numpy dtype, default float32
        Storage type.  A native sample type (``int16``, ``int32``) stores
        integer samples bit-exactly; ``float32`` holds integers of up to 24
        bits exactly.

    Attributes
    ----------
    overruns : int
        Number of ``write`` calls that found too little free space.
    frames_written : int
        Frames accepted into the ring since construction.
    frames_dropped : int
        Frames refused because the ring was full (the newest ones).

    Notes
    -----
    The storage is one C-ordered array of shape ``(capacity_frames, channels)``
    allocated here.  Positions are two monotonically increasing frame counts:
    the producer writes only ``_head`` (after the data is in place), the
    consumer writes only ``_tail``.  Under CPython each attribute store is
    atomic, which is all the synchronisation the data itself needs; a
    :class:`threading.Condition` is used only to wake a consumer that waits for
    frames (the producer holds its lock for the duration of one ``notify``).
    """

    def __init__(self, capacity_frames, channels, dtype=np.float32):
        if isinstance(capacity_frames, bool) or not isinstance(capacity_frames, (int, np.integer)) \
                or capacity_frames < 1:
            raise ValueError(f"{capacity_frames=} must be a positive whole number of frames")
        if isinstance(channels, bool) or not isinstance(channels, (int, np.integer)) or channels < 1:
            raise ValueError(f"{channels=} must be a positive whole number")
        self.capacity_frames = int(capacity_frames)
        self.channels = int(channels)
        self._buf = np.zeros((self.capacity_frames, self.channels), dtype=dtype)
        self.dtype = self._buf.dtype
        self._head = 0  # frames ever written (producer only)
        self._tail = 0  # frames ever consumed or discarded (consumer only)
        self._closed = False
        self._cond = threading.Condition(threading.Lock())
        self.overruns = 0
        self.frames_dropped = 0

    # ------------------------------------------------------------------ state
    @property
    def frames_written(self):
        """Frames accepted into the ring since construction."""
        return self._head

    @property
    def available(self):
        """Frames waiting to be read."""
        return self._head - self._tail

    @property
    def closed(self):
        """True once :meth:`close` was called (no more frames will come)."""
        return self._closed

    # --------------------------------------------------------------- producer
    def write(self, block):
        """Append frames; never blocks and never allocates storage.

        Parameters
        ----------
        block : numpy.ndarray
            Shape ``(n, channels)``; converted to the storage type on copy
            (``casting="unsafe"``, so the caller chooses a compatible type).

        Returns
        -------
        int
            Frames accepted (less than ``n`` on overrun; the newest frames of
            the block are the ones dropped).
        """
        n = block.shape[0]
        head = self._head
        free = self.capacity_frames - (head - self._tail)
        k = n if n <= free else free
        if k < n:
            self.overruns += 1
            self.frames_dropped += n - k
        if k > 0:
            start = head % self.capacity_frames
            first = self.capacity_frames - start
            if k <= first:
                np.copyto(self._buf[start:start + k], block[:k], casting="unsafe")
            else:
                np.copyto(self._buf[start:], block[:first], casting="unsafe")
                np.copyto(self._buf[:k - first], block[first:k], casting="unsafe")
            self._head = head + k
            with self._cond:
                self._cond.notify()
        return k

    def close(self):
        """Mark the end of the stream and wake a waiting consumer."""
        self._closed = True
        with self._cond:
            self._cond.notify_all()

    # --------------------------------------------------------------- consumer
    def read_into(self, out, timeout_s=None):
        """Wait for ``len(out)`` frames and copy them into ``out``.

        Parameters
        ----------
        out : numpy.ndarray
            Shape ``(n, channels)``; any dtype the storage type casts to
            (float64 for the capture arrays).
        timeout_s : float or None, default None
            Longest wait in seconds; None waits until the frames are there or
            the ring is closed.

        Returns
        -------
        int
            Frames copied to ``out[:k]``: ``n`` normally; fewer (possibly 0)
            when the timeout passed or the ring was closed first.
        """
        if out.ndim != 2 or out.shape[1] != self.channels:
            raise ValueError(f"out.shape={out.shape} must be (n, {self.channels})")
        if timeout_s is not None and not timeout_s >= 0:
            raise ValueError(f"{timeout_s=} must be >= 0 seconds or None")
        n = out.shape[0]
        if self._head - self._tail < n and not self._closed:
            deadline = None if timeout_s is None else time.monotonic() + timeout_s
            with self._cond:
                while self._head - self._tail < n and not self._closed:
                    if deadline is None:
                        self._cond.wait()
                    else:
                        left = deadline - time.monotonic()
                        if left <= 0:
                            break
                        self._cond.wait(left)
        tail = self._tail
        k = min(n, self._head - tail)
        if k > 0:
            start = tail % self.capacity_frames
            first = self.capacity_frames - start
            if k <= first:
                np.copyto(out[:k], self._buf[start:start + k], casting="unsafe")
            else:
                np.copyto(out[:first], self._buf[start:], casting="unsafe")
                np.copyto(out[first:k], self._buf[:k - first], casting="unsafe")
            self._tail = tail + k
        return k

    def discard(self):
        """Drop every buffered frame (consumer side); return how many.

        Use before a capture that must start with fresh signal.  The counters
        are not changed.
        """
        head = self._head
        dropped = head - self._tail
        self._tail = head
        return dropped
