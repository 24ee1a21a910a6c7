"""Replay of a WAV recording as a signal source.

Public API
----------
- :class:`WavSource` -- the ``wav`` source: unit ``"m_s2"`` for a float file
  (this package records acceleration in m/s^2 as float), ``"full_scale"`` for
  an integer file (+-1.0 full scale, calibrated per point like a sound card).
- :class:`Pacer` -- holds a reader to real time on a monotonic clock.

The file loops: at its end, reading continues from its first frame.  With
``source.realtime = true`` frames are released no faster than the sample rate
(deadlines measured from the opening instant, so no drift accumulates);
otherwise as fast as they can be decoded.
"""

from __future__ import annotations

import threading
import time

import numpy as np

from agent.errors import SourceError, WavFormatError
from agent.sources import BaseSource

__all__ = ["WavSource", "Pacer"]


class Pacer:
    """Release frames no faster than real time, without drift.

    Parameters
    ----------
    sample_rate_hz : float
        Frames per second.
    clock : callable, default time.monotonic
        Returns seconds; only differences matter.
    wait : callable or None
        ``wait(seconds)`` blocks for about that long; default waits on an
        internal :class:`threading.Event` (so :meth:`stop` ends a wait early).

    Notes
    -----
    The deadline of frame ``n`` is ``t0 + n / sample_rate_hz`` with ``t0`` the
    clock at :meth:`start`; ``advance(k)`` counts ``k`` more frames and waits
    until the clock passes the deadline of the last one.  Deadlines are
    absolute, so waiting a little too long once does not delay every later
    read (no drift).  :meth:`start` re-anchors the origin (a source's
    ``discard()`` does so, like a live input that was not read meanwhile).
    """

    def __init__(self, sample_rate_hz, clock=time.monotonic, wait=None):
        if not sample_rate_hz > 0:
            raise ValueError(f"{sample_rate_hz=} must be > 0 Hz")
        self.sample_rate_hz = float(sample_rate_hz)
        self._clock = clock
        self._stop = threading.Event()
        self._wait = wait if wait is not None else self._stop.wait
        self._t0 = None
        self.frames = 0

    def start(self):
        """Set the time origin to now and the frame count to zero."""
        self._stop.clear()
        self._t0 = self._clock()
        self.frames = 0

    def stop(self):
        """End any current wait early (closing the source)."""
        self._stop.set()

    def now(self):
        """The clock's current value, seconds."""
        return self._clock()

    def deadline(self, frames):
        """Clock value at which ``frames`` frames (counted from start) are due."""
        return self._t0 + frames / self.sample_rate_hz

    def advance(self, frames):
        """Count ``frames`` more and block until all counted frames are due."""
        if self._t0 is None:
            raise ValueError("Pacer.start() must be called before advance()")
        self.frames += frames
        due = self.deadline(self.frames)
        while not self._stop.is_set():
            left = due - self._clock()
            if left <= 0:
                return
            self._wait(left)


class WavSource(BaseSource):
    """Endless replay of a WAV file.

    Parameters
    ----------
    config : agent.config.Config
        Uses ``source.path``, ``sample_rate_hz`` (must equal the file's rate),
        ``channels`` (the first that many channels of the file are delivered)
        and ``realtime``.
    clock, wait : callable, optional
        Passed to :class:`Pacer` (tests inject a simulated clock).
    block_frames : int, default 4096
        Frames decoded per file read (fixed memory).
    """

    kind = "wav"

    def __init__(self, config, clock=time.monotonic, wait=None, block_frames=4096):
        super().__init__()
        src = config.source
        if src.path is None:
            raise ValueError("source.path must name the WAV file for source.kind = 'wav'")
        self.path = src.path
        self.sample_rate_hz = int(src.sample_rate_hz)
        self.channels = int(src.channels)
        self.realtime = bool(src.realtime)
        self.unit = "full_scale"
        self._block_frames = block_frames
        self._pacer = Pacer(self.sample_rate_hz, clock=clock, wait=wait)
        self._reader = None
        self._work = None
        self.frames_delivered = 0
        self.loops = 0

    def _open(self):
        from agent.wavio import WavReader

        try:
            reader = WavReader(self.path, block_frames=self._block_frames)
        except WavFormatError as exc:
            raise SourceError(str(exc)) from exc
        info = reader.info
        problem = None
        if info.sample_rate_hz != self.sample_rate_hz:
            problem = (f"is recorded at {info.sample_rate_hz} Hz but source.sample_rate_hz = "
                       f"{self.sample_rate_hz}: set source.sample_rate_hz = {info.sample_rate_hz}")
        elif info.channels < self.channels:
            problem = (f"has {info.channels} channels but source.channels = {self.channels}")
        elif info.frames == 0:
            problem = "holds no frames"
        if problem:
            reader.close()
            raise SourceError(f"{self.path}: {problem}")
        self._reader = reader
        self._work = np.zeros((self._block_frames, info.channels), dtype=np.float64)
        self.unit = "m_s2" if info.is_float else "full_scale"
        self.info = info
        self.frames_delivered = 0
        self.loops = 0
        self._pacer.start()

    def _close(self):
        self._pacer.stop()
        reader, self._reader = self._reader, None
        if reader is not None:
            try:
                reader.close()
            except WavFormatError as exc:
                raise SourceError(str(exc)) from exc

    def _read(self, out):
        n = out.shape[0]
        done = 0
        ch = self.channels
        try:
            while done < n:
                k = min(n - done, self._block_frames)
                work = self._work[:k]
                got = self._reader.read_into(work)
                if got == 0:
                    self._reader.seek_frame(0)
                    self.loops += 1
                    continue
                out[done:done + got] = work[:got, :ch]
                done += got
        except WavFormatError as exc:
            raise SourceError(str(exc)) from exc
        if self.realtime:
            self._pacer.advance(n)
        self.frames_delivered += n
        return n

    def discard(self):
        """Restart the real-time pacing from now (a live input drops what it
        was not asked for; a replay simply continues); returns 0."""
        if self._is_open:
            self._pacer.start()
        return 0

    def describe(self):
        """File, its format, loops so far and the pacing mode."""
        d = super().describe()
        info = getattr(self, "info", None)
        d.update({"path": str(self.path), "realtime": self.realtime, "loops": self.loops,
                  "file_channels": info.channels if info else None,
                  "file_frames": info.frames if info else None,
                  "sample_format": info.sample_format if info else None})
        return d
