"""Signal sources: one module per backend behind one small protocol.

Public API
----------
- :class:`Source` -- the protocol every backend follows (documented on the
  base class :class:`BaseSource`).
- :data:`REGISTRY` -- ``source.kind`` -> ``"module:Class"`` (static; a backend
  module is imported only when its kind is opened, so hardware libraries are
  never loaded on a machine that does not use them).
- :func:`open_source(config)` -> an *unopened* :class:`Source`; use it as a
  context manager (``with open_source(cfg) as src: src.read(out)``) or call
  ``open()`` / ``close()``.
- :func:`devices_report(config=None)` -> str, the text of ``ballpass devices``.

The protocol
------------
``sample_rate_hz`` (int), ``channels`` (int, always ``config.source.channels``),
``unit`` (``"full_scale"`` for +-1.0 digital full scale, ``"volt"`` or
``"m_s2"``), ``open()``, ``close()``, ``read(out) -> int`` (fills the float64
array ``out`` of shape ``(frames, channels)``, blocking; returns the frames
written, which is ``frames`` unless the source ended), ``overflows`` (overrun
events since open), ``discard()`` (drop what is buffered so the next read
starts with fresh signal) and ``describe() -> dict``.  Turning source units
into m/s^2 is :mod:`agent.calibration`.
"""

from __future__ import annotations

import importlib
from typing import Protocol, runtime_checkable

import numpy as np

__all__ = ["Source", "BaseSource", "REGISTRY", "source_class", "open_source", "devices_report",
           "UNITS"]

UNITS = ("full_scale", "volt", "m_s2")

REGISTRY = {
    "soundcard": "agent.sources.soundcard:SoundcardSource",
    "iio": "agent.sources.iio:IioSource",
    "wav": "agent.sources.wav:WavSource",
    "simulated": "agent.sources.simulated:SimulatedSource",
}


@runtime_checkable
class Source(Protocol):
    """What the capture loop needs from a signal source."""

    sample_rate_hz: int
    channels: int
    unit: str

    def open(self): ...

    def close(self): ...

    def read(self, out) -> int: ...

    def discard(self) -> int: ...

    @property
    def overflows(self) -> int: ...

    def describe(self) -> dict: ...


class BaseSource:
    """Shared behaviour of the backends: context manager and argument checks.

    Subclasses set ``kind``, ``sample_rate_hz``, ``channels``, ``unit`` and
    implement ``_open()``, ``_close()`` and ``_read(out) -> int``.
    """

    kind = ""

    def __init__(self):
        self._is_open = False

    @property
    def is_open(self):
        """True between :meth:`open` and :meth:`close`."""
        return self._is_open

    def open(self):
        """Start delivering signal (idempotent); returns ``self``."""
        if not self._is_open:
            self._open()
            self._is_open = True
        return self

    def close(self):
        """Stop and release the device or file (idempotent)."""
        if self._is_open:
            self._is_open = False
            self._close()

    def __enter__(self):
        return self.open()

    def __exit__(self, *exc):
        self.close()

    @property
    def overflows(self):
        """Overrun events since the source was opened (0 for file sources)."""
        return 0

    def discard(self):
        """Drop buffered frames so the next read starts fresh; return how many."""
        return 0

    def read(self, out):
        """Fill ``out`` with the next frames, blocking until they are there.

        Parameters
        ----------
        out : numpy.ndarray of float64, shape (frames, channels)
            Destination, in the source's ``unit``.

        Returns
        -------
        int
            Frames written (``frames`` unless the source ended).

        Raises
        ------
        agent.errors.SourceError
            The source stopped delivering.
        """
        if not isinstance(out, np.ndarray) or out.dtype != np.float64 or out.ndim != 2 \
                or out.shape[1] != self.channels:
            raise ValueError(f"out must be a float64 array of shape (frames, {self.channels})")
        if not self._is_open:
            raise ValueError(f"the {self.kind} source is not open: call open() or use 'with'")
        if out.shape[0] == 0:
            return 0
        return self._read(out)

    def describe(self):
        """Plain facts about the source for logs and the status message."""
        return {"kind": self.kind, "sample_rate_hz": self.sample_rate_hz,
                "channels": self.channels, "unit": self.unit, "overflows": self.overflows}

    def _open(self):
        raise NotImplementedError

    def _close(self):
        raise NotImplementedError

    def _read(self, out):
        raise NotImplementedError


def source_class(kind):
    """The backend class registered for ``kind`` (imports its module).

    Parameters
    ----------
    kind : str
        One of the keys of :data:`REGISTRY`.
    """
    if kind not in REGISTRY:
        raise ValueError(f"{kind=} must be one of {', '.join(REGISTRY)}")
    module_name, class_name = REGISTRY[kind].split(":")
    return getattr(importlib.import_module(module_name), class_name)


def open_source(config):
    """Build the source named by ``config.source.kind`` (not yet opened).

    Parameters
    ----------
    config : agent.config.Config
        The validated configuration.

    Returns
    -------
    Source
        Call ``open()`` or use it as a context manager before ``read``.
    """
    return source_class(config.source.kind)(config)


def devices_report(config=None):
    """Text of ``ballpass devices``: sound-card inputs and IIO devices.

    Parameters
    ----------
    config : agent.config.Config or None
        When given, the device the configuration selects is marked and the
        IIO devices are looked up under its ``source.sysfs_dir``.

    Returns
    -------
    str
        Human-readable lines; a backend that cannot be queried is reported in
        a line of its own instead of raising.
    """
    from agent.errors import SourceError
    from agent.sources import iio, soundcard

    lines = ["Sound-card inputs (PortAudio):"]
    chosen = None
    try:
        devices = soundcard.list_input_devices()
        if config is not None and config.source.kind == "soundcard":
            try:
                chosen = soundcard.find_input_device(config.source.device, devices)["index"]
            except SourceError as exc:
                lines.append(f"  configured device {config.source.device!r}: {exc}")
    except SourceError as exc:
        devices = []
        lines.append(f"  cannot list: {exc}")
    if not devices and len(lines) == 1:
        lines.append("  none found")
    for d in devices:
        mark = "*" if d["index"] == chosen else " "
        default = " (default)" if d["is_default"] else ""
        lines.append(f" {mark}{d['index']:3d}  {d['name']}{default}  [{d['hostapi']}]  "
                     f"{d['max_input_channels']} in, default {d['default_sample_rate_hz']:g} Hz")
    lowest = (config.source.lowest_trusted_hz
              if config is not None and config.source.kind == "soundcard"
              else soundcard.DEFAULT_LOWEST_TRUSTED_HZ)
    lines.append(f"  Note: sound-card inputs are AC-coupled (lower corner a few Hz to ~20 Hz, "
                 f"some add a DC-removal filter); results below {lowest:g} Hz "
                 f"(source.lowest_trusted_hz) are not trusted.")
    sysfs_dir = config.source.sysfs_dir if config is not None else iio.DEFAULT_SYSFS_DIR
    lines.append(f"IIO devices ({sysfs_dir}):")
    try:
        found = iio.list_devices(sysfs_dir)
    except SourceError as exc:
        found = []
        lines.append(f"  cannot list: {exc}")
    if not found:
        lines.append("  none found")
    for d in found:
        mark = "*" if (config is not None and config.source.kind == "iio"
                       and d["name"] == config.source.device) else " "
        chans = ", ".join(d["scan_elements"]) or "no buffered channels"
        lines.append(f" {mark}{d['id']}  {d['name']}  ({chans})")
    return "\n".join(lines)
