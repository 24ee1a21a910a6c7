"""Sound-card input through PortAudio (python-sounddevice).

Public API
----------
- :class:`SoundcardSource` -- the ``soundcard`` source; unit ``"full_scale"``.
- :func:`list_input_devices()` -> list of dict, for ``ballpass devices``.
- :func:`find_input_device(device, devices=None)` -> dict, the device chosen
  by index, name substring or "" (the default input).
- ``SAMPLE_DTYPES`` -- config ``sample_format`` -> (stream dtype, full-scale
  factor).
- ``DEFAULT_LOWEST_TRUSTED_HZ`` -- lowest trusted frequency of an AC-coupled
  input when no configuration says otherwise.

``sounddevice`` is imported lazily, inside :func:`_portaudio`, which is also
the one place where ``PortAudioError`` (and the ``OSError`` of a missing
PortAudio library) become :class:`~agent.errors.SourceError` /
:class:`~agent.errors.DeviceNotFound`.

The audio callback runs on PortAudio's real-time thread: it copies the block
into a preallocated :class:`~agent.ring.Ring` and counts the overflow flag,
nothing else.  Sound-card inputs are AC-coupled (a lower corner between a few
hertz and about 20 Hz, sometimes with a DC-removal filter), so the valid band
starts at ``source.lowest_trusted_hz``.
"""

from __future__ import annotations

import contextlib
import math

import numpy as np

from agent.errors import DeviceNotFound, SourceError
from agent.ring import Ring
from agent.sources import BaseSource

__all__ = ["SoundcardSource", "list_input_devices", "find_input_device", "SAMPLE_DTYPES",
           "DEFAULT_LOWEST_TRUSTED_HZ"]

DEFAULT_LOWEST_TRUSTED_HZ = 10.0

# sample_format -> (numpy/PortAudio dtype of the stream, factor to full scale +-1.0).
# 24-bit samples travel in PortAudio's left-justified 32-bit container.
SAMPLE_DTYPES = {
    "int16": ("int16", 2.0 ** -15),
    "int24": ("int32", 2.0 ** -31),
    "int32": ("int32", 2.0 ** -31),
    "float32": ("float32", 1.0),
}

_PA_INVALID_DEVICE = -9996
_PA_DEVICE_UNAVAILABLE = -9985

# The ring holds at least this much signal, so a capture loop that is late by
# a second or so loses nothing.
_RING_MIN_S = 2.0


@contextlib.contextmanager
def _portaudio(action):
    """Import sounddevice and translate its errors -- the one place that does.

    Parameters
    ----------
    action : str
        What was being done, for the message ("open the input stream of ...").

    Yields
    ------
    module
        The ``sounddevice`` module.
    """
    try:
        import sounddevice
    except OSError as exc:
        raise SourceError(f"cannot {action}: the PortAudio library is not available ({exc}); "
                          f"install libportaudio2") from exc
    try:
        yield sounddevice
    except sounddevice.PortAudioError as exc:
        code = exc.args[1] if len(exc.args) > 1 else None
        if code in (_PA_INVALID_DEVICE, _PA_DEVICE_UNAVAILABLE):
            raise DeviceNotFound(f"cannot {action}: {exc} (unplugged, or in use by another "
                                 f"program?)") from exc
        raise SourceError(f"cannot {action}: {exc}") from exc


def list_input_devices():
    """The input devices PortAudio knows about.

    Returns
    -------
    list of dict
        One dict per device with at least one input channel: ``index``,
        ``name``, ``max_input_channels``, ``default_sample_rate_hz``,
        ``hostapi`` (host API name) and ``is_default``.

    Raises
    ------
    agent.errors.SourceError
        PortAudio cannot be loaded or queried.

    Notes
    -----
    PortAudio enumerates devices once, when ``sounddevice`` is first imported;
    a card plugged in later appears only in a new process.
    """
    with _portaudio("list the input devices") as sd:
        hostapis = sd.query_hostapis()
        default_index = sd.default.device[0]
        if default_index is None or default_index < 0:
            default_index = hostapis[sd.default.hostapi]["default_input_device"] \
                if sd.default.hostapi >= 0 else -1
        out = []
        for d in sd.query_devices():
            if d["max_input_channels"] < 1:
                continue
            out.append({
                "index": int(d["index"]),
                "name": d["name"],
                "max_input_channels": int(d["max_input_channels"]),
                "default_sample_rate_hz": float(d["default_samplerate"]),
                "hostapi": hostapis[d["hostapi"]]["name"],
                "is_default": int(d["index"]) == default_index,
            })
    return out


def _listing(devices):
    if not devices:
        return "no input devices found"
    return "input devices: " + "; ".join(f"{d['index']}: {d['name']!r}" for d in devices)


def find_input_device(device, devices=None):
    """Choose the input device named by ``source.device``.

    Parameters
    ----------
    device : str
        ``""`` for the default input, a whole number for a PortAudio device
        index, or a case-insensitive substring of the device name.  A name
        that equals one device's whole name selects it even when it is also
        part of other names.
    devices : list of dict or None
        The result of :func:`list_input_devices` (queried when None).

    Returns
    -------
    dict
        The chosen entry of ``devices``.

    Raises
    ------
    agent.errors.DeviceNotFound
        Nothing matches; the message lists the available inputs.
    agent.errors.SourceError
        A name substring matches more than one input; the message lists them.
    """
    if not isinstance(device, str):
        raise ValueError(f"{device=} must be a string (an index in digits, a name part, or '')")
    if devices is None:
        devices = list_input_devices()
    wanted = device.strip()
    if wanted == "":
        for d in devices:
            if d["is_default"]:
                return d
        raise DeviceNotFound(f"source.device = '': there is no default input device; "
                             f"{_listing(devices)}")
    if wanted.isdigit():
        for d in devices:
            if d["index"] == int(wanted):
                return d
        raise DeviceNotFound(f"source.device = {device!r}: no input device with that index; "
                             f"{_listing(devices)}")
    needle = wanted.casefold()
    matches = [d for d in devices if needle in d["name"].casefold()]
    exact = [d for d in matches if d["name"].casefold() == needle]
    if len(exact) == 1:
        return exact[0]
    if len(matches) == 1:
        return matches[0]
    if not matches:
        raise DeviceNotFound(f"source.device = {device!r}: no input device name contains it; "
                             f"{_listing(devices)}")
    raise SourceError(f"source.device = {device!r}: matches {len(matches)} input devices, "
                      f"give a longer part of the name or the index: {_listing(matches)}")


class SoundcardSource(BaseSource):
    """Continuous capture from a sound-card input.

    Parameters
    ----------
    config : agent.config.Config
        Uses ``source.device``, ``sample_rate_hz``, ``channels``,
        ``sample_format``, ``latency_s``, ``buffer_frames`` and
        ``lowest_trusted_hz``.
    ring_frames : int or None
        Capacity of the ring in frames; default the larger of
        ``source.buffer_frames`` and ``max(2 s, 8 x latency)`` of signal.

    Notes
    -----
    The stream is opened with ``blocksize=0`` (the host chooses the block)
    and ``latency=source.latency_s``; settings are checked with
    ``check_input_settings`` first, so an unsupported rate or format is
    reported before anything starts.  ``read`` returns samples scaled to full
    scale +-1.0 (``int16 / 2**15``, 32-bit container ``/ 2**31``).

    If the reader falls behind, the ring drops the newest frames and counts
    an overrun (see :mod:`agent.ring`).  In interval mode, call
    :meth:`discard` before each capture, or close the source between
    captures, so that a capture never starts with old signal.
    """

    kind = "soundcard"

    def __init__(self, config, ring_frames=None):
        super().__init__()
        src = config.source
        if src.sample_format not in SAMPLE_DTYPES:
            raise ValueError(f"source.sample_format={src.sample_format!r} must be one of "
                             f"{', '.join(SAMPLE_DTYPES)}")
        self.sample_rate_hz = int(src.sample_rate_hz)
        self.channels = int(src.channels)
        self.unit = "full_scale"
        self.device = src.device
        self.sample_format = src.sample_format
        self.latency_s = float(src.latency_s)
        self.lowest_trusted_hz = float(src.lowest_trusted_hz)
        self._dtype, self._scale = SAMPLE_DTYPES[src.sample_format]
        if ring_frames is None:
            ring_frames = max(int(src.buffer_frames),
                              math.ceil(self.sample_rate_hz * max(_RING_MIN_S, 8 * self.latency_s)))
        self._ring = Ring(ring_frames, self.channels, dtype=self._dtype)
        self._chunk_frames = max(1, ring_frames // 2)
        self._stream = None
        self._device_info = None
        self._device_overflows = 0

    # ------------------------------------------------------------ real-time side
    def _callback(self, indata, frames, time_info, status):
        """PortAudio callback: copy into the ring, count the overflow flag."""
        if status.input_overflow:
            self._device_overflows += 1
        self._ring.write(indata)

    def _finished(self):
        self._ring.close()

    # ------------------------------------------------------------ consumer side
    @property
    def overflows(self):
        """Input overflows reported by the device plus ring overruns."""
        return self._device_overflows + self._ring.overruns

    @property
    def ring(self):
        """The :class:`~agent.ring.Ring` between the callback and ``read``."""
        return self._ring

    def _open(self):
        devices = list_input_devices()
        info = find_input_device(self.device, devices)
        what = f"open input device {info['index']} {info['name']!r}"
        if self.channels > info["max_input_channels"]:
            raise SourceError(f"cannot {what}: source.channels = {self.channels} but the device "
                              f"has {info['max_input_channels']} input channels")
        self._ring = Ring(self._ring.capacity_frames, self.channels, dtype=self._dtype)
        self._device_overflows = 0
        with _portaudio(f"{what} at {self.sample_rate_hz} Hz, {self.channels} channels, "
                        f"{self.sample_format}") as sd:
            sd.check_input_settings(device=info["index"], channels=self.channels,
                                    dtype=self._dtype, samplerate=self.sample_rate_hz)
            stream = sd.InputStream(device=info["index"], channels=self.channels,
                                    dtype=self._dtype, samplerate=self.sample_rate_hz,
                                    blocksize=0, latency=self.latency_s,
                                    callback=self._callback, finished_callback=self._finished)
            try:
                stream.start()
            except BaseException:
                stream.close(ignore_errors=True)
                raise
        self._stream = stream
        self._device_info = info

    def _close(self):
        stream, self._stream = self._stream, None
        if stream is not None:
            with _portaudio(f"close input device {self._device_info['name']!r}"):
                stream.close()
        self._ring.close()

    def discard(self):
        """Drop the frames waiting in the ring; return how many."""
        return self._ring.discard()

    def _read(self, out):
        n = out.shape[0]
        done = 0
        slack_s = max(2.0, 4.0 * self.latency_s)
        while done < n:
            k = min(self._chunk_frames, n - done)
            got = self._ring.read_into(out[done:done + k], timeout_s=k / self.sample_rate_hz + slack_s)
            done += got
            if got < k:
                name = self._device_info["name"] if self._device_info else self.device
                if self._ring.closed:
                    raise SourceError(f"input device {name!r} stopped delivering (stream ended "
                                      f"after {self._ring.frames_written} frames)")
                raise SourceError(f"input device {name!r} delivered no signal for "
                                  f"{slack_s:g} s (unplugged?)")
        if self._scale != 1.0:
            np.multiply(out, self._scale, out=out)
        return n

    def describe(self):
        """Device, format, latency, counters and the trusted band."""
        d = super().describe()
        info = self._device_info or {}
        d.update({
            "device": info.get("name", self.device),
            "device_index": info.get("index"),
            "hostapi": info.get("hostapi"),
            "sample_format": self.sample_format,
            "latency_s": self.latency_s,
            "ring_frames": self._ring.capacity_frames,
            "device_overflows": self._device_overflows,
            "ring_overruns": self._ring.overruns,
            "frames_dropped": self._ring.frames_dropped,
            "lowest_trusted_hz": self.lowest_trusted_hz,
            "note": "sound-card inputs are AC-coupled: results below "
                    f"{self.lowest_trusted_hz:g} Hz are not trusted",
        })
        return d
