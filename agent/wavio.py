"""Streamed reading and writing of WAV files in fixed memory.

The standard library's ``wave`` module handles integer PCM only, so the RIFF
container is parsed here directly.  Nothing in this module holds a whole
recording: a reader owns one byte buffer of ``block_frames`` frames, allocated
when the file is opened, and decodes each block into the caller's array.

Public API
----------
- :class:`WavInfo` -- what a file holds (rate, channels, frames, sample format).
- :func:`read_wav_info` -- the :class:`WavInfo` of a file, without reading data.
- :class:`WavReader` -- context manager; ``read_into(out)`` fills a float64
  array with the next frames, ``read_channel_into(out_1d, channel)`` fills a
  1-D array with one channel, ``seek_frame(i)`` moves to a frame.
- :class:`WavWriter` -- context manager; ``write(block)`` appends float
  frames, the header sizes are patched on ``close()``.
- ``SAMPLE_FORMATS`` -- the sample formats read and written.

Sample values
-------------
Integer formats are scaled so that full scale is +-1.0 (``int16 / 32768``,
``int24 / 2**23``, ``int32 / 2**31``) on reading; on writing, +-1.0 is full
scale and values beyond it are clipped.  Float formats are passed through as
stored (a float recording of this package holds acceleration in m/s^2).

Every failure (missing file, not a RIFF/WAVE file, unsupported encoding,
truncated header, I/O error) is raised as :class:`agent.errors.WavFormatError`
with the file name and what is wrong.
"""

from __future__ import annotations

import contextlib
import os
import struct
from dataclasses import dataclass

import numpy as np

from agent.errors import WavFormatError

__all__ = ["SAMPLE_FORMATS", "WavInfo", "read_wav_info", "WavReader", "WavWriter"]

_WAVE_FORMAT_PCM = 0x0001
_WAVE_FORMAT_IEEE_FLOAT = 0x0003
_WAVE_FORMAT_EXTENSIBLE = 0xFFFE

# sample format -> (format tag, bits per sample, numpy dtype of one stored
# sample or None for the packed 24-bit case, scale to full scale +-1.0)
_FORMATS = {
    "int16": (_WAVE_FORMAT_PCM, 16, np.dtype("<i2"), 1.0 / 32768.0),
    "int24": (_WAVE_FORMAT_PCM, 24, None, 1.0 / 8388608.0),
    "int32": (_WAVE_FORMAT_PCM, 32, np.dtype("<i4"), 1.0 / 2147483648.0),
    "float32": (_WAVE_FORMAT_IEEE_FLOAT, 32, np.dtype("<f4"), 1.0),
    "float64": (_WAVE_FORMAT_IEEE_FLOAT, 64, np.dtype("<f8"), 1.0),
}
SAMPLE_FORMATS = tuple(_FORMATS)

_MAX_RIFF_BYTES = 0xFFFFFFFF
_UNSET_DATA_SIZE = 0xFFFFFFFF  # placeholder some recorders leave in the header


@dataclass(frozen=True)
class WavInfo:
    """What a WAV file holds.

    Attributes
    ----------
    sample_rate_hz : int
        Frames per second.
    channels : int
        Samples per frame.
    frames : int
        Number of whole frames in the data chunk (clamped to what the file
        really holds when a recording was cut short).
    sample_format : str
        One of ``"int16"``, ``"int24"``, ``"int32"``, ``"float32"``,
        ``"float64"``.
    is_float : bool
        True for IEEE float samples (values as stored), False for integer PCM
        (scaled to full scale +-1.0 on reading).
    frames_declared : int or None
        Frames the header announces when the file holds fewer (a recording
        cut short: only ``frames`` are read); None when the file holds them
        all or the header leaves the size open.
    """

    sample_rate_hz: int
    channels: int
    frames: int
    sample_format: str
    is_float: bool
    frames_declared: int | None = None

    @property
    def duration_s(self):
        """Length of the recording in seconds (``frames / sample_rate_hz``)."""
        return self.frames / self.sample_rate_hz


@contextlib.contextmanager
def _translated(path, action):
    """Turn I/O and header-unpacking errors into :class:`WavFormatError`.

    The one place where ``OSError`` and ``struct.error`` from this module are
    translated; every file operation below runs inside it.
    """
    try:
        yield
    except OSError as exc:
        reason = exc.strerror or str(exc)
        raise WavFormatError(f"{os.fspath(path)}: cannot {action}: {reason}") from exc
    except struct.error as exc:
        raise WavFormatError(
            f"{os.fspath(path)}: cannot {action}: truncated or malformed header ({exc})"
        ) from exc


def _read_exact(fh, nbytes, path, what):
    data = fh.read(nbytes)
    if len(data) != nbytes:
        raise WavFormatError(
            f"{os.fspath(path)}: truncated header: file ends inside the {what} "
            f"({len(data)} of {nbytes} bytes)")
    return data


def _parse_fmt(body, path):
    """Sample format, channels and rate from a ``fmt `` chunk body."""
    name = os.fspath(path)
    if len(body) < 16:
        raise WavFormatError(f"{name}: truncated header: fmt chunk has {len(body)} bytes, needs 16")
    tag, channels, rate, _byte_rate, block_align, bits = struct.unpack_from("<HHIIHH", body)
    if tag == _WAVE_FORMAT_EXTENSIBLE:
        if len(body) < 40:
            raise WavFormatError(
                f"{name}: truncated header: extensible fmt chunk has {len(body)} bytes, needs 40")
        valid_bits = struct.unpack_from("<H", body, 18)[0]
        tag = struct.unpack_from("<H", body, 24)[0]  # first two bytes of the SubFormat GUID
        if valid_bits > bits:
            raise WavFormatError(
                f"{name}: malformed fmt chunk: {valid_bits} valid bits in {bits}-bit containers")
        # fewer valid bits are left-justified in the container: reading the
        # container at its own full scale gives the right values
    if tag == _WAVE_FORMAT_PCM and bits in (16, 24, 32):
        sample_format = f"int{bits}"
    elif tag == _WAVE_FORMAT_IEEE_FLOAT and bits in (32, 64):
        sample_format = f"float{bits}"
    else:
        kind = {_WAVE_FORMAT_PCM: "integer PCM",
                _WAVE_FORMAT_IEEE_FLOAT: "IEEE float"}.get(tag, f"format tag 0x{tag:04X}")
        raise WavFormatError(
            f"{name}: unsupported format: {kind} with {bits} bits per sample "
            f"(supported: {', '.join(SAMPLE_FORMATS)})")
    if channels < 1:
        raise WavFormatError(f"{name}: unsupported format: {channels} channels")
    if rate < 1:
        raise WavFormatError(f"{name}: unsupported format: sample rate {rate} Hz")
    if block_align != channels * bits // 8:
        raise WavFormatError(
            f"{name}: unsupported format: block align {block_align} bytes does not match "
            f"{channels} channels of {bits} bits")
    return sample_format, channels, rate


def _parse_header(fh, path):
    """Walk the RIFF chunks; return ``(WavInfo, data_offset)``.

    Unknown chunks (``LIST``, ``cue ``, ...) are skipped with their pad byte.
    """
    name = os.fspath(path)
    riff = _read_exact(fh, 12, path, "RIFF header")
    if riff[:4] != b"RIFF" or riff[8:12] != b"WAVE":
        if riff[:4] in (b"RF64", b"RIFX"):
            raise WavFormatError(f"{name}: unsupported format: {riff[:4].decode()} container")
        raise WavFormatError(f"{name}: not a RIFF/WAVE file (starts with {riff[:12]!r})")
    file_size = os.fstat(fh.fileno()).st_size
    fmt = None
    data = None  # (offset, declared size)
    pos = 12
    while fmt is None or data is None:
        if pos + 8 > file_size:
            missing = "fmt chunk" if fmt is None else "data chunk"
            if pos < file_size:
                raise WavFormatError(f"{name}: truncated header: file ends inside a chunk header")
            raise WavFormatError(f"{name}: no {missing} found")
        fh.seek(pos)
        chunk_id, size = struct.unpack("<4sI", _read_exact(fh, 8, path, "chunk header"))
        body_pos = pos + 8
        if chunk_id == b"fmt ":
            fmt = _parse_fmt(_read_exact(fh, size, path, "fmt chunk"), path)
        elif chunk_id == b"data":
            data = (body_pos, size)
            if size == _UNSET_DATA_SIZE:
                break  # streamed recording: the data run to the end of the file
        pos = body_pos + size + (size & 1)
    if fmt is None:
        raise WavFormatError(f"{name}: no fmt chunk before the open-ended data chunk")
    sample_format, channels, rate = fmt
    block_align = channels * _FORMATS[sample_format][1] // 8
    data_offset, data_size = data
    available = max(0, file_size - data_offset)
    frames = min(data_size, available) // block_align
    declared = None
    if data_size != _UNSET_DATA_SIZE and data_size // block_align > frames:
        declared = data_size // block_align
    info = WavInfo(sample_rate_hz=rate, channels=channels, frames=frames,
                   sample_format=sample_format, is_float=sample_format.startswith("float"),
                   frames_declared=declared)
    return info, data_offset


def read_wav_info(path):
    """Describe a WAV file without reading its samples.

    Parameters
    ----------
    path : str or os.PathLike
        The WAV file.

    Returns
    -------
    WavInfo
        Sample rate, channels, frames and sample format.

    Raises
    ------
    agent.errors.WavFormatError
        The file is missing, unreadable, not RIFF/WAVE, truncated or in an
        unsupported encoding.
    """
    with _translated(path, "read WAV header"), open(path, "rb") as fh:
        info, _ = _parse_header(fh, path)
    return info


class WavReader:
    """Read a WAV file block by block into caller-provided float64 arrays.

    Parameters
    ----------
    path : str or os.PathLike
        The WAV file (RIFF/WAVE; PCM 16/24/32-bit, IEEE float 32/64-bit, plain
        or WAVE_FORMAT_EXTENSIBLE).
    block_frames : int, default 4096
        Frames decoded per file read; sets the size of the one byte buffer the
        reader owns.

    Attributes
    ----------
    info : WavInfo
        What the file holds.
    position_frames : int
        Index of the next frame to be read.

    Notes
    -----
    Memory is fixed at opening: one ``bytearray`` of ``block_frames`` frames
    (plus one int32 work array for 24-bit files).  Each block is read with
    ``readinto`` into that buffer and decoded from ``numpy.frombuffer`` views
    straight into the caller's array, so reading a ten-minute recording uses
    the same memory as reading a one-second one.
    """

    def __init__(self, path, block_frames=4096):
        if isinstance(block_frames, bool) or not isinstance(block_frames, int) or block_frames < 1:
            raise ValueError(f"{block_frames=} must be a positive whole number of frames")
        self._path = path
        self._fh = None
        with _translated(path, "open WAV file"):
            fh = open(path, "rb")
            try:
                self.info, self._data_offset = _parse_header(fh, path)
                fh.seek(self._data_offset)
            except BaseException:
                fh.close()
                raise
        self._fh = fh
        info = self.info
        _tag, bits, dtype, self._scale = _FORMATS[info.sample_format]
        self._block_align = info.channels * bits // 8
        self._block_frames = block_frames
        self._raw = bytearray(block_frames * self._block_align)
        self._raw_mv = memoryview(self._raw)
        if dtype is not None:
            self._samples = np.frombuffer(self._raw, dtype=dtype).reshape(block_frames, info.channels)
            self._packed = None
        else:
            # 24-bit: copy the three bytes of each sample into the upper bytes of
            # an int32 and shift right arithmetically to sign-extend.
            self._packed = np.frombuffer(self._raw, dtype=np.uint8).reshape(-1, 3)
            self._wide = np.zeros(block_frames * info.channels, dtype="<i4")
            self._wide_bytes = self._wide.view(np.uint8).reshape(-1, 4)
            self._samples = self._wide.reshape(block_frames, info.channels)
        self.position_frames = 0

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def close(self):
        """Close the file (idempotent)."""
        if self._fh is not None:
            fh, self._fh = self._fh, None
            with _translated(self._path, "close WAV file"):
                fh.close()

    @property
    def frames_remaining(self):
        """Frames left to read from the current position."""
        return self.info.frames - self.position_frames

    def seek_frame(self, frame):
        """Move to a frame so that the next read starts there.

        Parameters
        ----------
        frame : int
            Frame index, ``0 <= frame <= info.frames``.
        """
        if isinstance(frame, bool) or not isinstance(frame, (int, np.integer)) \
                or not 0 <= frame <= self.info.frames:
            raise ValueError(f"{frame=} must be a frame index in [0, {self.info.frames}]")
        self._check_open()
        with _translated(self._path, "seek in WAV file"):
            self._fh.seek(self._data_offset + int(frame) * self._block_align)
        self.position_frames = int(frame)

    def read_into(self, out):
        """Fill ``out`` with the next frames.

        Parameters
        ----------
        out : numpy.ndarray of float64
            Shape ``(n, channels)``, or ``(n,)`` when the file has one channel.
            Integer samples are scaled to full scale +-1.0; float samples are
            written as stored.

        Returns
        -------
        int
            Frames written to ``out[:k]`` (fewer than ``n`` near the end of the
            file, 0 at the end).  ``out[k:]`` is left untouched.
        """
        channels = self.info.channels
        if not isinstance(out, np.ndarray) or out.dtype != np.float64:
            raise ValueError("out must be a float64 numpy array")
        if out.ndim == 1 and channels == 1:
            def target(w, k):
                return out[w:w + k], self._samples[:k, 0]
        elif out.ndim == 2 and out.shape[1] == channels:
            def target(w, k):
                return out[w:w + k], self._samples[:k]
        else:
            raise ValueError(
                f"out.shape={out.shape} must be (n, {channels})"
                + (" or (n,)" if channels == 1 else ""))
        return self._fill(out.shape[0], target)

    def read_channel_into(self, out_1d, channel):
        """Fill ``out_1d`` with the next frames of one channel.

        The frames of every channel are consumed; only ``channel`` is written.

        Parameters
        ----------
        out_1d : numpy.ndarray of float64, shape (n,)
            Destination.
        channel : int
            Channel index, ``0 <= channel < info.channels``.

        Returns
        -------
        int
            Frames written to ``out_1d[:k]`` (0 at the end of the file).
        """
        if not isinstance(out_1d, np.ndarray) or out_1d.dtype != np.float64 or out_1d.ndim != 1:
            raise ValueError("out_1d must be a one-dimensional float64 numpy array")
        if isinstance(channel, bool) or not isinstance(channel, (int, np.integer)) \
                or not 0 <= channel < self.info.channels:
            raise ValueError(f"{channel=} must be a channel index in [0, {self.info.channels})")

        def target(w, k):
            return out_1d[w:w + k], self._samples[:k, channel]
        return self._fill(out_1d.shape[0], target)

    def _check_open(self):
        if self._fh is None:
            raise ValueError(f"WavReader of {os.fspath(self._path)} is closed")

    def _fill(self, wanted, target):
        self._check_open()
        written = 0
        while written < wanted:
            k = self._read_block(min(wanted - written, self._block_frames))
            if k == 0:
                break
            dst, src = target(written, k)
            np.multiply(src, self._scale, out=dst)
            written += k
        return written

    def _read_block(self, max_frames):
        """Read up to ``max_frames`` frames into the byte buffer and decode them."""
        k = min(max_frames, self.frames_remaining)
        if k <= 0:
            return 0
        nbytes = k * self._block_align
        got = 0
        with _translated(self._path, "read WAV data"):
            while got < nbytes:
                n = self._fh.readinto(self._raw_mv[got:nbytes])
                if not n:
                    break
                got += n
        k = got // self._block_align
        if self._packed is not None and k:
            count = k * self.info.channels
            self._wide_bytes[:count, 1:] = self._packed[:count]
            np.right_shift(self._wide[:count], 8, out=self._wide[:count])
        self.position_frames += k
        return k


class WavWriter:
    """Write float frames to a WAV file, streaming.

    Parameters
    ----------
    path : str or os.PathLike
        File to create (overwritten if it exists).
    sample_rate_hz : int
        Frames per second.
    channels : int, default 1
        Samples per frame.
    sample_format : str, default "float32"
        ``"float32"``/``"float64"`` (WAVE_FORMAT_IEEE_FLOAT with a ``fact``
        chunk; values stored as given) or ``"int16"``/``"int24"``/``"int32"``
        (PCM; +-1.0 is full scale, values beyond are clipped).
    block_frames : int, default 4096
        Frames converted per file write; sets the size of the work buffer.

    Notes
    -----
    The header is written with zero sizes at opening and patched on
    ``close()`` (also when leaving the ``with`` block).  A data chunk of odd
    length gets its pad byte.  Integer conversion rounds to nearest:
    ``round(x * 2**(bits-1))`` clipped to ``[-2**(bits-1), 2**(bits-1) - 1]``.
    """

    def __init__(self, path, sample_rate_hz, channels=1, sample_format="float32",
                 block_frames=4096):
        if isinstance(sample_rate_hz, bool) or not isinstance(sample_rate_hz, (int, np.integer)) \
                or not 1 <= sample_rate_hz <= _MAX_RIFF_BYTES:
            raise ValueError(f"{sample_rate_hz=} must be a positive whole number of hertz")
        if isinstance(channels, bool) or not isinstance(channels, (int, np.integer)) \
                or not 1 <= channels <= 65535:
            raise ValueError(f"{channels=} must be a whole number in [1, 65535]")
        if sample_format not in _FORMATS:
            raise ValueError(f"{sample_format=} must be one of {', '.join(SAMPLE_FORMATS)}")
        if isinstance(block_frames, bool) or not isinstance(block_frames, int) or block_frames < 1:
            raise ValueError(f"{block_frames=} must be a positive whole number of frames")
        self._path = path
        self.sample_rate_hz = int(sample_rate_hz)
        self.channels = int(channels)
        self.sample_format = sample_format
        tag, bits, dtype, _scale = _FORMATS[sample_format]
        self._tag = tag
        self._bits = bits
        self._block_align = self.channels * bits // 8
        self._block_frames = block_frames
        self.frames_written = 0
        count = block_frames * self.channels
        if sample_format == "int24":
            self._work = np.zeros(count, dtype="<i4")
            self._out_bytes = np.zeros((count, 3), dtype=np.uint8)
        else:
            self._work = np.zeros(count, dtype=dtype)
            self._out_bytes = self._work.view(np.uint8)
        self._full_scale = float(2 ** (bits - 1)) if tag == _WAVE_FORMAT_PCM else None
        self._scaled = np.zeros(count if self._full_scale else 0, dtype=np.float64)
        self._fh = None
        header = self._header(0)
        with _translated(path, "create WAV file"):
            fh = open(path, "wb")
            try:
                fh.write(header)
            except BaseException:
                fh.close()
                raise
        self._fh = fh
        self._header_bytes = len(header)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def _header(self, frames):
        data_bytes = frames * self._block_align
        if self._tag == _WAVE_FORMAT_PCM:
            fmt = struct.pack("<HHIIHH", self._tag, self.channels, self.sample_rate_hz,
                              self.sample_rate_hz * self._block_align, self._block_align,
                              self._bits)
            fact = b""
        else:
            fmt = struct.pack("<HHIIHHH", self._tag, self.channels, self.sample_rate_hz,
                              self.sample_rate_hz * self._block_align, self._block_align,
                              self._bits, 0)
            fact = b"fact" + struct.pack("<II", 4, frames)
        body = (b"WAVE" + b"fmt " + struct.pack("<I", len(fmt)) + fmt + fact
                + b"data" + struct.pack("<I", data_bytes))
        riff_size = len(body) + data_bytes + (data_bytes & 1)
        return b"RIFF" + struct.pack("<I", riff_size) + body

    def write(self, block):
        """Append frames.

        Parameters
        ----------
        block : array_like of float
            Shape ``(n, channels)``, or ``(n,)`` when writing one channel.

        Returns
        -------
        int
            Frames written (``n``).
        """
        if self._fh is None:
            raise ValueError(f"WavWriter of {os.fspath(self._path)} is closed")
        block = np.asarray(block)
        if block.dtype.kind != "f":
            raise ValueError(f"block.dtype={block.dtype} must be a float type")
        if block.ndim == 1 and self.channels == 1:
            block = block.reshape(-1, 1)
        if block.ndim != 2 or block.shape[1] != self.channels:
            raise ValueError(f"block.shape={block.shape} must be (n, {self.channels})"
                             + (" or (n,)" if self.channels == 1 else ""))
        n = block.shape[0]
        total = self._header_bytes + (self.frames_written + n) * self._block_align + 1
        if total > _MAX_RIFF_BYTES:
            raise WavFormatError(
                f"{os.fspath(self._path)}: cannot write {n} more frames: the file would "
                f"exceed the 4 GiB limit of the WAV format")
        ch = self.channels
        with _translated(self._path, "write WAV data"):
            for start in range(0, n, self._block_frames):
                k = min(self._block_frames, n - start)
                count = k * ch
                src = block[start:start + k]
                work = self._work[:count].reshape(k, ch)
                if self._full_scale is None:
                    np.copyto(work, src, casting="same_kind")
                    payload = self._out_bytes[:count * work.itemsize]
                else:
                    self._to_int(src, work)
                    if self.sample_format == "int24":
                        wide = self._work[:count].view(np.uint8).reshape(count, 4)
                        self._out_bytes[:count] = wide[:, :3]
                        payload = self._out_bytes[:count]
                    else:
                        payload = self._out_bytes[:count * work.itemsize]
                self._fh.write(memoryview(payload).cast("B"))
                self.frames_written += k
        return n

    def _to_int(self, src, work):
        """``round(x * full_scale)`` clipped to the integer range, into ``work``.

        Exact in float64 for every supported width (at most 32 bits).
        """
        full = self._full_scale
        tmp = self._scaled[:work.size].reshape(work.shape)
        np.multiply(src, full, out=tmp)
        np.rint(tmp, out=tmp)
        np.clip(tmp, -full, full - 1.0, out=tmp)
        np.copyto(work, tmp, casting="unsafe")

    def close(self):
        """Patch the header sizes, add the pad byte if needed, close the file."""
        if self._fh is None:
            return
        fh, self._fh = self._fh, None
        with _translated(self._path, "finish WAV file"):
            try:
                data_bytes = self.frames_written * self._block_align
                if data_bytes & 1:
                    fh.write(b"\x00")
                fh.seek(0)
                fh.write(self._header(self.frames_written))
            finally:
                fh.close()
