"""Linux Industrial I/O (IIO) buffered ADC input.

Public API
----------
- :class:`IioSource` -- the ``iio`` source; unit ``"volt"`` for voltage
  channels, ``"m_s2"`` for accelerometer channels.
- :func:`list_devices(sysfs_dir)` -> list of dict (``id``, ``name``,
  ``scan_elements``), for ``ballpass devices``.
- :func:`parse_scan_type(text)` -> :class:`ScanType`.
- :class:`ScanType`, :class:`Channel`.
- ``DEFAULT_SYSFS_DIR``.

How a device is driven (kernel sysfs ABI, Documentation/ABI/testing/sysfs-bus-iio)
--------------------------------------------------------------------------------
The device is the ``iio:deviceN`` directory under ``source.sysfs_dir`` whose
``name`` file equals ``source.device``.  Opening disables the buffer, enables
the first ``source.channels`` scan elements in ``index`` order (every other
scan element, the timestamp included, is disabled), writes
``sampling_frequency``, ``buffer/length`` (``source.buffer_frames``) and
``buffer/enable``.  Frames are then read from ``source.dev_dir/iio:deviceN``:
the enabled elements in index order, each aligned to its own storage size,
the whole frame padded to the largest storage size.  A raw value is decoded
per its ``scan_elements/*_type`` (``[be|le]:[s|u|f]bits/storagebits[Xrepeat]
[>>shift]``: byte order, shift right, mask to ``bits``, sign-extend) and
converted with ``value = (raw + offset) * scale`` using the channel's own
``*_scale``/``*_offset`` or the ones shared by its type
(``in_voltage_scale``); voltages come out in millivolts (divided by 1000
here: unit volt), accelerations in m/s^2.  Closing disables the buffer.

The kernel's buffer is the ring between the ADC and this reader (sized by
``buffer/length``); a reader that falls behind loses samples inside the
kernel, which the IIO ABI does not count, so ``overflows`` stays 0.

Every ``OSError`` becomes a :class:`~agent.errors.SourceError` naming the
path, in :func:`_sysfs`.
"""

from __future__ import annotations

import contextlib
import os
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from agent.errors import DeviceNotFound, SourceError
from agent.sources import BaseSource

__all__ = ["IioSource", "ScanType", "Channel", "parse_scan_type", "list_devices",
           "DEFAULT_SYSFS_DIR"]

DEFAULT_SYSFS_DIR = Path("/sys/bus/iio/devices")

_TYPE_RE = re.compile(r"^(be|le):([suf])(\d+)/(\d+)(?:X(\d+))?(?:>>(\d+))?$")
_EN_RE = re.compile(r"^(.+)_en$")
# Unit after (raw + offset) * scale, per channel type (sysfs-bus-iio), and the
# factor to the unit this source reports.
_CHANNEL_UNITS = {"in_voltage": ("volt", 1e-3), "in_accel": ("m_s2", 1.0)}


@contextlib.contextmanager
def _sysfs(path, action):
    """Turn ``OSError`` into :class:`SourceError` naming the path (the one place)."""
    try:
        yield
    except OSError as exc:
        raise SourceError(f"{os.fspath(path)}: cannot {action}: {exc.strerror or exc}") from exc


def _read_text(path):
    with _sysfs(path, "read"):
        return Path(path).read_text().strip()


def _write_text(path, value):
    with _sysfs(path, f"write {value!r}"), open(path, "w") as fh:
        fh.write(f"{value}\n")


@dataclass(frozen=True)
class ScanType:
    """Storage of one scan element in a buffer frame.

    Attributes
    ----------
    big_endian : bool
    kind : str
        ``"s"`` signed (two's complement), ``"u"`` unsigned, ``"f"`` IEEE float.
    bits : int
        Valid data bits.
    storage_bits : int
        Bits the element occupies (also its alignment).
    repeat : int
        Repetitions of bits/storagebits (1 when absent).
    shift : int
        Right shift applied before masking to ``bits``.
    """

    big_endian: bool
    kind: str
    bits: int
    storage_bits: int
    repeat: int = 1
    shift: int = 0

    @property
    def storage_bytes(self):
        """Bytes of one repetition (the alignment of the element)."""
        return self.storage_bits // 8

    @property
    def size_bytes(self):
        """Bytes the whole element occupies in a frame."""
        return self.storage_bytes * self.repeat


def parse_scan_type(text):
    """Parse a scan element's ``_type`` text.

    Parameters
    ----------
    text : str
        E.g. ``"le:s12/16>>4"``, ``"be:u24/32>>0"``, ``"le:s16/16X3>>0"``.

    Returns
    -------
    ScanType

    Notes
    -----
    Form ``[be|le]:[s|u|f]bits/storagebits[Xrepeat][>>shift]`` (kernel sysfs
    ABI, Documentation/ABI/testing/sysfs-bus-iio; ``X0`` and ``X1`` both mean
    one repetition).
    """
    m = _TYPE_RE.match(text.strip())
    if m is None:
        raise ValueError(f"{text=} is not a scan type of the form "
                         f"[be|le]:[s|u|f]bits/storagebits[Xrepeat][>>shift]")
    endian, kind, bits, storage, repeat, shift = m.groups()
    st = ScanType(big_endian=endian == "be", kind=kind, bits=int(bits), storage_bits=int(storage),
                  repeat=max(1, int(repeat or 1)), shift=int(shift or 0))
    if st.storage_bits not in (8, 16, 32, 64):
        raise ValueError(f"{text=}: storage of {st.storage_bits} bits is not 8, 16, 32 or 64")
    if not 1 <= st.bits <= st.storage_bits or st.bits + st.shift > st.storage_bits:
        raise ValueError(f"{text=}: {st.bits} bits shifted by {st.shift} do not fit in "
                         f"{st.storage_bits} storage bits")
    if kind == "f" and (st.bits != st.storage_bits or st.storage_bits not in (32, 64)):
        raise ValueError(f"{text=}: float elements must be 32 or 64 bits filling their storage")
    return st


@dataclass(frozen=True)
class Channel:
    """One enabled scan element and its conversion to physical units."""

    name: str           # e.g. "in_voltage0", "in_accel_x"
    index: int
    scan_type: ScanType
    scale: float
    offset: float
    unit: str
    unit_factor: float  # from the ABI unit (mV, m/s^2) to ``unit``


def _channel_type(name):
    """``in_voltage0`` -> ``in_voltage``; ``in_accel_x`` -> ``in_accel``."""
    m = re.match(r"^(in_[a-z]+?)(\d+|_[a-z0-9]+)?$", name)
    return m.group(1) if m else name


def _find_device_dir(sysfs_dir, name):
    devices = list_devices(sysfs_dir)
    if name:
        for d in devices:
            if d["name"] == name:
                return Path(sysfs_dir) / d["id"], d["id"]
    elif len(devices) == 1:
        return Path(sysfs_dir) / devices[0]["id"], devices[0]["id"]
    listing = ", ".join(f"{d['id']} {d['name']!r}" for d in devices) or "none"
    what = f"named {name!r}" if name else "(source.device is empty and there is not exactly one)"
    raise DeviceNotFound(f"{os.fspath(sysfs_dir)}: no IIO device {what}; devices found: {listing}")


def list_devices(sysfs_dir=DEFAULT_SYSFS_DIR):
    """IIO devices under ``sysfs_dir``.

    Parameters
    ----------
    sysfs_dir : path
        Normally ``/sys/bus/iio/devices``.

    Returns
    -------
    list of dict
        ``id`` (``"iio:deviceN"``), ``name`` and ``scan_elements`` (element
        names in index order, without ``_en``), sorted by device number.
        Empty when the directory does not exist.
    """
    base = Path(sysfs_dir)
    if not base.is_dir():
        return []
    out = []
    with _sysfs(base, "list IIO devices"):
        entries = sorted((p for p in base.iterdir() if p.name.startswith("iio:device")),
                         key=lambda p: int(p.name[len("iio:device"):] or -1)
                         if p.name[len("iio:device"):].isdigit() else -1)
    for p in entries:
        name_file = p / "name"
        name = _read_text(name_file) if name_file.exists() else ""
        out.append({"id": p.name, "name": name,
                    "scan_elements": [n for n, _ in _scan_elements(p)]})
    return out


def _scan_dir(device_dir):
    """``scan_elements/`` (newer kernels also show the elements in ``buffer0/``)."""
    legacy = device_dir / "scan_elements"
    return legacy if legacy.is_dir() or not (device_dir / "buffer0").is_dir() \
        else device_dir / "buffer0"


def _scan_elements(device_dir):
    """``[(name, index), ...]`` of the device's scan elements, in index order."""
    scan_dir = _scan_dir(device_dir)
    if not scan_dir.is_dir():
        return []
    with _sysfs(scan_dir, "list scan elements"):
        names = sorted(m.group(1) for m in map(_EN_RE.match, os.listdir(scan_dir)) if m)
    elements = []
    for n in names:
        path = scan_dir / f"{n}_index"
        text = _read_text(path)
        if not text.isdigit():
            raise SourceError(f"{os.fspath(path)}: {text!r} is not a scan index")
        elements.append((n, int(text)))
    return sorted(elements, key=lambda e: e[1])


def _attr_float(device_dir, channel_name, attr, default):
    """Channel attribute, else the one shared by its type, else ``default``."""
    for candidate in (f"{channel_name}_{attr}", f"{_channel_type(channel_name)}_{attr}"):
        path = device_dir / candidate
        if path.exists():
            text = _read_text(path)
            try:
                return float(text)
            except ValueError:
                raise SourceError(f"{os.fspath(path)}: {text!r} is not a number") from None
    return default


def _frame_layout(channels):
    """Byte offset of each element and the frame size, as the kernel lays them out."""
    offsets = []
    pos = 0
    largest = 1
    for ch in channels:
        align = ch.scan_type.storage_bytes
        pos = (pos + align - 1) // align * align
        offsets.append(pos)
        pos += ch.scan_type.size_bytes
        largest = max(largest, align)
    frame_bytes = (pos + largest - 1) // largest * largest
    return offsets, frame_bytes


class IioSource(BaseSource):
    """Buffered capture from a Linux IIO ADC or accelerometer.

    Parameters
    ----------
    config : agent.config.Config
        Uses ``source.device`` (the IIO device ``name``), ``sysfs_dir``,
        ``dev_dir``, ``sample_rate_hz``, ``channels`` and ``buffer_frames``.
    block_frames : int, default 4096
        Frames decoded per read of the character device (size of the one
        byte buffer and work arrays allocated at opening).

    Notes
    -----
    The configured ``sample_rate_hz`` is written to ``sampling_frequency`` and
    read back; a driver that picked another rate is an error naming the
    rates it offers (``sampling_frequency_available``), since every frequency
    downstream depends on the true rate.
    """

    kind = "iio"

    def __init__(self, config, block_frames=4096):
        super().__init__()
        if isinstance(block_frames, bool) or not isinstance(block_frames, int) or block_frames < 1:
            raise ValueError(f"{block_frames=} must be a positive whole number of frames")
        src = config.source
        self.sample_rate_hz = int(src.sample_rate_hz)
        self.channels = int(src.channels)
        self.device = src.device
        self.sysfs_dir = Path(src.sysfs_dir)
        self.dev_dir = Path(src.dev_dir)
        self.buffer_frames = int(src.buffer_frames)
        self.unit = "volt"
        self._block_frames = block_frames
        self._device_dir = None
        self._dev_path = None
        self._fh = None
        self._chans = ()

    # ---------------------------------------------------------------- opening
    def _open(self):
        device_dir, dev_id = _find_device_dir(self.sysfs_dir, self.device)
        elements = [e for e in _scan_elements(device_dir) if not e[0].endswith("timestamp")]
        scan_dir = _scan_dir(device_dir)
        if len(elements) < self.channels:
            raise SourceError(f"{os.fspath(device_dir)}: source.channels = {self.channels} but the "
                              f"device has {len(elements)} buffered channels "
                              f"({', '.join(n for n, _ in elements) or 'none'})")
        chosen = elements[:self.channels]
        chans = []
        for name, index in chosen:
            type_path = scan_dir / f"{name}_type"
            if not type_path.exists():
                type_path = scan_dir / f"{_channel_type(name)}_type"  # shared by the type
            try:
                st = parse_scan_type(_read_text(type_path))
            except ValueError as exc:
                raise SourceError(f"{os.fspath(type_path)}: {exc}") from None
            if st.repeat != 1:
                raise SourceError(f"{os.fspath(type_path)}: elements with repeat {st.repeat} "
                                  f"are not supported")
            ctype = _channel_type(name)
            if ctype not in _CHANNEL_UNITS:
                raise SourceError(f"{os.fspath(scan_dir / name)}_en: channel type {ctype!r} is not "
                                  f"supported (supported: {', '.join(_CHANNEL_UNITS)})")
            unit, factor = _CHANNEL_UNITS[ctype]
            chans.append(Channel(name=name, index=index, scan_type=st,
                                 scale=_attr_float(device_dir, name, "scale", 1.0),
                                 offset=_attr_float(device_dir, name, "offset", 0.0),
                                 unit=unit, unit_factor=factor))
        units = sorted({c.unit for c in chans})
        if len(units) > 1:
            raise SourceError(f"{os.fspath(device_dir)}: the first {self.channels} channels mix "
                              f"units ({', '.join(units)}); use channels of one type")
        buffer_dir = device_dir / "buffer"
        if not buffer_dir.is_dir() and (device_dir / "buffer0").is_dir():
            buffer_dir = device_dir / "buffer0"
        enable_path = buffer_dir / "enable"
        _write_text(enable_path, 0)
        chosen_names = {n for n, _ in chosen}
        for name, _ in _scan_elements(device_dir):
            _write_text(scan_dir / f"{name}_en", 1 if name in chosen_names else 0)
        freq_path = device_dir / "sampling_frequency"
        _write_text(freq_path, self.sample_rate_hz)
        actual = _read_text(freq_path)
        try:
            actual_hz = float(actual)
        except ValueError:
            raise SourceError(f"{os.fspath(freq_path)}: {actual!r} is not a number") from None
        if abs(actual_hz - self.sample_rate_hz) > 1e-6 * self.sample_rate_hz:
            avail_path = device_dir / "sampling_frequency_available"
            avail = _read_text(avail_path) if avail_path.exists() else "not listed"
            raise SourceError(f"{os.fspath(freq_path)}: wrote {self.sample_rate_hz} Hz but the "
                              f"device runs at {actual} Hz; offered rates: {avail}")
        _write_text(buffer_dir / "length", self.buffer_frames)

        offsets, frame_bytes = _frame_layout(chans)
        self._allocate(chans, offsets, frame_bytes)
        dev_path = self.dev_dir / dev_id
        _write_text(enable_path, 1)
        try:
            with _sysfs(dev_path, "open the IIO character device"):
                self._fh = open(dev_path, "rb", buffering=0)
        except SourceError:
            _write_text(enable_path, 0)
            raise
        self._device_dir, self._dev_path, self._enable_path = device_dir, dev_path, enable_path
        self._dev_id = dev_id
        self._chans = tuple(chans)
        self.unit = chans[0].unit

    def _allocate(self, chans, offsets, frame_bytes):
        """The byte buffer, its structured view and the work arrays (once per open)."""
        n = self._block_frames
        self._frame_bytes = frame_bytes
        self._raw = bytearray(n * frame_bytes)
        self._raw_mv = memoryview(self._raw)
        fields = {"names": [], "formats": [], "offsets": [], "itemsize": frame_bytes}
        for i, (ch, off) in enumerate(zip(chans, offsets)):
            st = ch.scan_type
            code = "f" if st.kind == "f" else "u"  # integers: sign handled after masking
            fields["names"].append(f"c{i}")
            fields["formats"].append(np.dtype(f"{'>' if st.big_endian else '<'}{code}{st.storage_bytes}"))
            fields["offsets"].append(off)
        self._frames = np.frombuffer(self._raw, dtype=np.dtype(fields))
        self._work = np.zeros(n, dtype=np.int64)
        self._workf = np.zeros(n, dtype=np.float64)
        self._pending = 0  # bytes of an incomplete frame kept at the start of _raw
        self._pending_bytes_after = 0

    def _close(self):
        fh, self._fh = self._fh, None
        try:
            if fh is not None:
                with _sysfs(self._dev_path, "close the IIO character device"):
                    fh.close()
        finally:
            _write_text(self._enable_path, 0)

    # ---------------------------------------------------------------- reading
    def _read(self, out):
        n = out.shape[0]
        done = 0
        while done < n:
            k = self._read_frames(min(self._block_frames, n - done))
            self._decode(k, out[done:done + k])
            done += k
        return n

    def _read_frames(self, max_frames):
        """Read at least one whole frame (at most ``max_frames``) into ``_raw``."""
        fb = self._frame_bytes
        want = max_frames * fb
        got = self._pending
        with _sysfs(self._dev_path, "read frames"):
            while got < fb:
                r = self._fh.readinto(self._raw_mv[got:want])
                if not r:
                    raise SourceError(f"{os.fspath(self._dev_path)}: the device stopped "
                                      f"delivering frames (end of data; buffer disabled?)")
                got += r
        k = got // fb
        rest = got - k * fb
        self._pending_bytes_after = rest
        return k

    def _decode(self, k, out):
        """Convert ``k`` frames of ``_raw`` into physical units in ``out[:k]``."""
        frames = self._frames[:k]
        work = self._work[:k]
        workf = self._workf[:k]
        for i, ch in enumerate(self._chans):
            st = ch.scan_type
            col = out[:k, i]
            if st.kind == "f":
                np.copyto(workf, frames[f"c{i}"], casting="unsafe")
            else:
                np.copyto(work, frames[f"c{i}"], casting="unsafe")
                if st.shift:
                    np.right_shift(work, st.shift, out=work)
                if st.bits < 64:
                    np.bitwise_and(work, (1 << st.bits) - 1, out=work)
                if st.kind == "s" and st.bits < 64:
                    sign = 1 << (st.bits - 1)
                    np.bitwise_xor(work, sign, out=work)
                    np.subtract(work, sign, out=work)
                np.copyto(workf, work, casting="unsafe")
            np.add(workf, ch.offset, out=workf)
            np.multiply(workf, ch.scale * ch.unit_factor, out=col)
        # keep the bytes of a partial frame for the next read
        rest = self._pending_bytes_after
        if rest:
            start = k * self._frame_bytes
            self._raw[:rest] = self._raw[start:start + rest]
        self._pending = rest

    def describe(self):
        """Device, channels with their scan types and scales, unit."""
        d = super().describe()
        d.update({
            "device": self.device,
            "device_dir": os.fspath(self._device_dir) if self._device_dir else None,
            "char_device": os.fspath(self._dev_path) if self._dev_path else None,
            "buffer_frames": self.buffer_frames,
            "channels_used": [{"name": c.name, "index": c.index, "scale": c.scale,
                               "offset": c.offset} for c in self._chans],
            "note": "samples lost inside the kernel buffer are not counted by the IIO ABI",
        })
        return d
