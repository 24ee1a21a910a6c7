"""Tests of agent.wavio against scipy.io.wavfile and the RIFF/WAVE layout.

Layout references used below:
- RIFF/WAVE chunks, PCM and the ``fact`` chunk: Microsoft/IBM, "Multimedia
  Programming Interface and Data Specifications 1.0", 1991 (chunk = 4-byte id,
  little-endian u32 size, body, pad byte when the size is odd).
- WAVE_FORMAT_IEEE_FLOAT = 3 and WAVE_FORMAT_EXTENSIBLE = 0xFFFE with the
  SubFormat GUID whose first two bytes are the format tag: Microsoft,
  "WAVEFORMATEXTENSIBLE structure" (mmreg.h / ksmedia.h).
"""

import os
import struct
import tracemalloc

import numpy as np
import pytest
import scipy.io.wavfile

from agent.errors import WavFormatError
from agent.wavio import SAMPLE_FORMATS, WavReader, WavWriter, read_wav_info

# full scale of each integer width, as scipy returns them (left-justified)
FULL_SCALE = {"int16": 2.0 ** 15, "int24": 2.0 ** 31, "int32": 2.0 ** 31}
GUID_TAIL = b"\x00\x00\x00\x00\x10\x00\x80\x00\x00\xaa\x00\x38\x9b\x71"  # KSDATAFORMAT_SUBTYPE_* tail


def chunk(chunk_id, body):
    """One RIFF chunk with its pad byte (RIFF spec 1991)."""
    return chunk_id + struct.pack("<I", len(body)) + body + (b"\x00" if len(body) % 2 else b"")


def riff(*chunks):
    body = b"WAVE" + b"".join(chunks)
    return b"RIFF" + struct.pack("<I", len(body)) + body


def fmt_body(tag, channels, rate, bits, extra=b""):
    align = channels * bits // 8
    return struct.pack("<HHIIHH", tag, channels, rate, rate * align, align, bits) + extra


def extensible_fmt(sub_tag, channels, rate, bits):
    # cbSize=22, wValidBitsPerSample, dwChannelMask, SubFormat GUID (WAVEFORMATEXTENSIBLE)
    extra = struct.pack("<HHI", 22, bits, 0) + struct.pack("<H", sub_tag) + GUID_TAIL
    return fmt_body(0xFFFE, channels, rate, bits, extra)


def read_all(path, block_frames=4096, out_frames=1000):
    """Read a whole file through read_into with a small reused buffer."""
    with WavReader(path, block_frames=block_frames) as reader:
        ch = reader.info.channels
        out = np.empty((out_frames, ch))
        parts = []
        while True:
            k = reader.read_into(out)
            if k == 0:
                break
            parts.append(out[:k].copy())
    return np.concatenate(parts) if parts else np.empty((0, ch))


def signal(frames, channels, seed=0):
    return np.random.default_rng(seed).uniform(-1.0, 1.0, (frames, channels))


@pytest.mark.parametrize("dtype", ["int16", "int32", "float32", "float64"])
@pytest.mark.parametrize("channels", [1, 2, 3])
def test_reads_scipy_written_files_exactly(tmp_path, dtype, channels):
    path = tmp_path / "ref.wav"
    x = signal(777, channels)
    if dtype.startswith("int"):
        data = np.round(x * (FULL_SCALE[dtype] - 1)).astype(dtype)
        expected = data / FULL_SCALE[dtype]  # full scale +-1.0: int16/32768, int32/2**31
    else:
        data = (x * 30.0).astype(dtype)  # float: values as stored (m/s^2)
        expected = data.astype(np.float64)
    scipy.io.wavfile.write(path, 12800, data if channels > 1 else data[:, 0])
    info = read_wav_info(path)
    assert (info.sample_rate_hz, info.channels, info.frames) == (12800, channels, 777)
    assert info.sample_format == dtype
    assert info.is_float == dtype.startswith("float")
    assert info.duration_s == pytest.approx(777 / 12800)
    got = read_all(path, block_frames=100, out_frames=64)
    np.testing.assert_array_equal(got, expected)


@pytest.mark.parametrize("sample_format", SAMPLE_FORMATS)
@pytest.mark.parametrize("channels", [1, 2])
def test_written_files_read_back_by_scipy(tmp_path, sample_format, channels):
    path = tmp_path / "ours.wav"
    x = signal(1001, channels, seed=1) * 1.2  # some samples beyond full scale
    with WavWriter(path, 8000, channels=channels, sample_format=sample_format,
                   block_frames=128) as writer:
        writer.write(x[:500] if channels > 1 else x[:500, 0])
        writer.write(x[500:] if channels > 1 else x[500:, 0])
    fs, data = scipy.io.wavfile.read(path)
    data = data.reshape(len(data), -1)
    assert fs == 8000 and data.shape == (1001, channels)
    if sample_format.startswith("float"):
        np.testing.assert_array_equal(data, x.astype(sample_format))
    else:
        bits = int(sample_format[3:])
        full = 2.0 ** (bits - 1)
        expected = np.clip(np.rint(x * full), -full, full - 1)
        if bits == 24:
            data = data >> 8  # scipy returns 24-bit data left-justified in int32 (scipy docs)
        np.testing.assert_array_equal(data, expected)
    # and our reader gives back what scipy sees, scaled to +-1.0
    got = read_all(path)
    if sample_format.startswith("float"):
        np.testing.assert_array_equal(got, x.astype(sample_format))
    else:
        np.testing.assert_array_equal(got, expected / full)


def test_float_writer_uses_ieee_tag_and_fact_chunk(tmp_path):
    # WAVE_FORMAT_IEEE_FLOAT (3) and a fact chunk with the frame count for
    # non-PCM data (RIFF spec 1991, "fact chunk")
    path = tmp_path / "f.wav"
    with WavWriter(path, 1000, channels=2, sample_format="float32") as writer:
        writer.write(np.zeros((37, 2)))
    raw = path.read_bytes()
    assert raw[:4] == b"RIFF" and raw[8:12] == b"WAVE"
    assert struct.unpack_from("<I", raw, 4)[0] == len(raw) - 8
    chunks, pos = {}, 12
    while pos < len(raw):
        cid, size = struct.unpack_from("<4sI", raw, pos)
        chunks[cid] = raw[pos + 8:pos + 8 + size]
        pos += 8 + size + (size & 1)
    assert struct.unpack_from("<H", chunks[b"fmt "])[0] == 3
    assert struct.unpack("<I", chunks[b"fact"])[0] == 37
    assert len(chunks[b"data"]) == 37 * 2 * 4
    with WavWriter(tmp_path / "i.wav", 1000, sample_format="int16") as writer:
        writer.write(np.zeros(5))
    raw = (tmp_path / "i.wav").read_bytes()
    assert struct.unpack_from("<H", raw, 20)[0] == 1  # PCM tag, 16-byte fmt chunk
    assert b"fact" not in raw


def test_odd_length_data_gets_pad_byte(tmp_path):
    # mono int24 with an odd frame count: 3 * 5 = 15 data bytes + 1 pad (RIFF spec 1991)
    path = tmp_path / "odd.wav"
    x = np.array([0.0, 0.5, -0.5, 0.25, -1.0])
    with WavWriter(path, 4000, sample_format="int24") as writer:
        writer.write(x)
    assert os.path.getsize(path) % 2 == 0
    fs, data = scipy.io.wavfile.read(path)
    np.testing.assert_array_equal(data >> 8, np.rint(x * 2 ** 23))
    np.testing.assert_array_equal(read_all(path)[:, 0], x)


@pytest.mark.filterwarnings("ignore::scipy.io.wavfile.WavFileWarning")
def test_skips_unknown_and_odd_sized_chunks(tmp_path):
    path = tmp_path / "chunks.wav"
    samples = np.arange(-50, 51, dtype="<i2") * 300
    raw = riff(
        chunk(b"LIST", b"INFOIART\x03\x00\x00\x00ab\x00"),   # odd size, padded
        chunk(b"fmt ", fmt_body(1, 1, 22050, 16)),
        chunk(b"junk", b"xyz"),                              # odd size, padded
        chunk(b"data", samples.tobytes()),
        chunk(b"cue ", b"\x00" * 4),
    )
    path.write_bytes(raw)
    fs, ref = scipy.io.wavfile.read(path)
    assert fs == 22050
    np.testing.assert_array_equal(ref, samples)
    got = read_all(path)[:, 0]
    np.testing.assert_array_equal(got, ref / 32768.0)


@pytest.mark.parametrize("sub_tag,bits,dtype", [(3, 32, "<f4"), (1, 16, "<i2"), (1, 24, None)])
def test_reads_wave_format_extensible(tmp_path, sub_tag, bits, dtype):
    path = tmp_path / "ext.wav"
    rng = np.random.default_rng(3)
    if dtype is None:
        ints = rng.integers(-2 ** 23, 2 ** 23, size=(64, 2))
        payload = b"".join(int(v).to_bytes(3, "little", signed=True) for v in ints.ravel())
    else:
        payload = (rng.uniform(-1, 1, (64, 2)) * (1 if dtype == "<f4" else 32000)).astype(dtype).tobytes()
    path.write_bytes(riff(chunk(b"fmt ", extensible_fmt(sub_tag, 2, 48000, bits)),
                          chunk(b"data", payload)))
    fs, ref = scipy.io.wavfile.read(path)
    assert fs == 48000
    info = read_wav_info(path)
    assert info.channels == 2 and info.frames == 64
    got = read_all(path, block_frames=7)
    if sub_tag == 3:
        np.testing.assert_array_equal(got, ref)
    else:
        full = 2.0 ** 15 if bits == 16 else 2.0 ** 31  # scipy: left-justified int32 for 24-bit
        np.testing.assert_array_equal(got, ref / full)


def test_streamed_read_matches_whole_file_read(tmp_path):
    path = tmp_path / "long.wav"
    frames = 200_003
    x = signal(frames, 2, seed=5)
    with WavWriter(path, 20000, channels=2, sample_format="int24") as writer:
        for start in range(0, frames, 9000):
            writer.write(x[start:start + 9000])
    fs, ref = scipy.io.wavfile.read(path)
    ref = ref / 2.0 ** 31  # scipy: 24-bit left-justified in int32
    got = read_all(path, block_frames=4096, out_frames=1500)
    np.testing.assert_array_equal(got, ref)
    # one channel at a time, and after seeking
    with WavReader(path, block_frames=1000) as reader:
        out = np.empty(3333)
        for channel in (0, 1):
            reader.seek_frame(0)
            pos = 0
            while (k := reader.read_channel_into(out, channel)) > 0:
                np.testing.assert_array_equal(out[:k], ref[pos:pos + k, channel])
                pos += k
            assert pos == frames
        reader.seek_frame(123_456)
        assert reader.position_frames == 123_456
        block = np.empty((10, 2))
        assert reader.read_into(block) == 10
        np.testing.assert_array_equal(block, ref[123_456:123_466])
        reader.seek_frame(frames)
        assert reader.read_into(block) == 0


def _peak_read_bytes(path):
    """Peak traced memory while opening and reading a whole file."""
    out = np.empty(1024)
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        base = tracemalloc.get_traced_memory()[0]
        total = 0
        with WavReader(path) as reader:
            while (k := reader.read_channel_into(out, 0)) > 0:
                total += k
        peak = tracemalloc.get_traced_memory()[1] - base
    finally:
        tracemalloc.stop()
    return peak, total


def test_read_memory_does_not_depend_on_length(tmp_path):
    # 60 s and 600 s at a low rate keep the test fast; the point is that the
    # peak is the same for both (fixed memory), far below the file size
    rate = 2000
    peaks = {}
    for seconds in (60, 600):
        path = tmp_path / f"{seconds}s.wav"
        block = np.sin(np.arange(rate) * 0.01) * 0.5
        with WavWriter(path, rate, sample_format="float32") as writer:
            for _ in range(seconds):
                writer.write(block)
        peak, total = _peak_read_bytes(path)
        assert total == seconds * rate
        peaks[seconds] = peak
    long_file_bytes = 600 * rate * 4
    assert peaks[600] < long_file_bytes / 50
    assert abs(peaks[600] - peaks[60]) < 2048


def test_truncated_data_is_clamped_to_whole_frames(tmp_path):
    path = tmp_path / "cut.wav"
    samples = np.arange(100, dtype="<i2")
    raw = riff(chunk(b"fmt ", fmt_body(1, 2, 8000, 16)), chunk(b"data", samples.tobytes()))
    path.write_bytes(raw[:-11])  # recorder stopped mid-frame: 39 bytes short
    info = read_wav_info(path)
    assert info.frames == (100 * 2 - 11) // 4
    assert info.frames_declared == 50  # what the header announces, for the user's note
    got = read_all(path)
    np.testing.assert_array_equal(got, samples[:info.frames * 2].reshape(-1, 2) / 32768.0)


def test_a_complete_file_declares_nothing_missing(tmp_path):
    path = tmp_path / "whole.wav"
    samples = np.arange(100, dtype="<i2")
    path.write_bytes(riff(chunk(b"fmt ", fmt_body(1, 2, 8000, 16)), chunk(b"data", samples.tobytes())))
    info = read_wav_info(path)
    assert (info.frames, info.frames_declared) == (50, None)


@pytest.mark.parametrize("content,words", [
    (None, "No such file"),
    (b"", "truncated header"),
    (b"This is not a wave file at all, just text.\n" * 3, "not a RIFF/WAVE"),
    (b"RIFF\x10\x00\x00\x00WAVEfmt \x10\x00\x00\x00\x01\x00", "truncated header"),
    (riff(chunk(b"fmt ", fmt_body(1, 1, 8000, 16))), "no data chunk"),
    (riff(chunk(b"data", b"\x00" * 8)), "no fmt chunk"),
    (riff(chunk(b"fmt ", fmt_body(1, 1, 8000, 8)), chunk(b"data", b"\x80" * 8)), "unsupported format"),
    (riff(chunk(b"fmt ", fmt_body(2, 1, 8000, 4)), chunk(b"data", b"\x00" * 8)), "0x0002"),
    (riff(chunk(b"fmt ", fmt_body(1, 0, 8000, 16)), chunk(b"data", b"")), "channels"),
    (b"RF64\xff\xff\xff\xffWAVEds64", "RF64"),
])
def test_bad_files_raise_wav_format_error(tmp_path, content, words):
    path = tmp_path / "bad.wav"
    if content is not None:
        path.write_bytes(content)
    for attempt in (read_wav_info, WavReader):
        with pytest.raises(WavFormatError) as err:
            attempt(path)
        assert "bad.wav" in str(err.value)
        assert words in str(err.value)


def test_directory_is_reported_not_raised_raw(tmp_path):
    with pytest.raises(WavFormatError, match="cannot"):
        read_wav_info(tmp_path)
    with pytest.raises(WavFormatError, match="cannot create"):
        WavWriter(tmp_path / "missing-dir" / "x.wav", 8000)


def test_caller_mistakes_raise_value_error(tmp_path):
    path = tmp_path / "ok.wav"
    with WavWriter(path, 8000, channels=2) as writer:
        writer.write(np.zeros((10, 2)))
        with pytest.raises(ValueError, match="block.shape"):
            writer.write(np.zeros(10))
        with pytest.raises(ValueError, match="float"):
            writer.write(np.zeros((10, 2), dtype=np.int16))
    with pytest.raises(ValueError, match="sample_format"):
        WavWriter(tmp_path / "x.wav", 8000, sample_format="int8")
    with pytest.raises(ValueError, match="sample_rate_hz"):
        WavWriter(tmp_path / "x.wav", 0)
    with pytest.raises(ValueError, match="channels"):
        WavWriter(tmp_path / "x.wav", 8000, channels=0)
    with pytest.raises(ValueError, match="block_frames"):
        WavReader(path, block_frames=0)
    with WavReader(path) as reader:
        with pytest.raises(ValueError, match="out.shape"):
            reader.read_into(np.empty(10))
        with pytest.raises(ValueError, match="float64"):
            reader.read_into(np.empty((10, 2), dtype=np.float32))
        with pytest.raises(ValueError, match="channel"):
            reader.read_channel_into(np.empty(10), 2)
        with pytest.raises(ValueError, match="frame"):
            reader.seek_frame(11)
    with pytest.raises(ValueError, match="closed"):
        reader.read_into(np.empty((10, 2)))
