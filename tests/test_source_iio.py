"""IIO source against a fixture sysfs tree and character device.

The tree follows the kernel's sysfs ABI for IIO devices
(Documentation/ABI/testing/sysfs-bus-iio): ``iio:deviceN/name``,
``sampling_frequency``, ``buffer/{enable,length}``,
``scan_elements/<chan>_{en,index,type}``, ``<chan>_scale``/``<chan>_offset``
or the ones shared by the channel type (``in_voltage_scale``).  The character
device is a regular file (or a FIFO) of frames packed with ``struct`` the way
the kernel lays them out: elements in index order, each aligned to its
storage size, the frame padded to the largest element.
"""

import os
import struct
import threading

import numpy as np
import pytest

from agent.config import parse_config
from agent.errors import DeviceNotFound, SourceError
from agent.sources import devices_report, open_source
from agent.sources.iio import ScanType, list_devices, parse_scan_type

RATE = 8000
SCALE_SHARED_MV = 0.805664062       # 3300 mV / 4096 codes, a 12-bit ADC on 3.3 V (common practice)
SCALE_CH1_MV = 0.000476837158203125  # 8000 mV / 2**24
OFFSET_CH1 = -8388608                # bipolar 24-bit converter reporting offset binary
ACCEL_SCALE = 0.009576806             # m/s^2 per LSB: a +-16 g MEMS part, 16 bits (from memory)


def _write(path, text):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(f"{text}\n")


def _read(path):
    return path.read_text().strip()


def _make_adc(root, dev_id, name, elements, attrs):
    """elements: [(chan, index, type, en)], attrs: {file: text}."""
    d = root / "sys" / dev_id
    _write(d / "name", name)
    _write(d / "sampling_frequency", 1000)
    _write(d / "sampling_frequency_available", "1000 2000 4000 8000")
    _write(d / "buffer" / "length", 2)
    _write(d / "buffer" / "enable", 0)
    for chan, index, type_, en in elements:
        _write(d / "scan_elements" / f"{chan}_en", en)
        _write(d / "scan_elements" / f"{chan}_index", index)
        _write(d / "scan_elements" / f"{chan}_type", type_)
    for f, text in attrs.items():
        _write(d / f, text)
    return d


@pytest.fixture
def tree(tmp_path):
    _make_adc(tmp_path, "iio:device0", "other-adc",
              [("in_voltage0", 0, "le:u10/16>>0", 0)], {"in_voltage_scale": 1.0})
    adc = _make_adc(tmp_path, "iio:device1", "larkspur-adc", [
        ("in_voltage0", 0, "le:s12/16>>4", 0),
        ("in_voltage1", 1, "be:u24/32>>0", 0),
        ("in_voltage2", 2, "le:s16/16>>0", 1),
        ("in_timestamp", 3, "le:s64/64>>0", 1),
    ], {"in_voltage_scale": SCALE_SHARED_MV, "in_voltage1_scale": SCALE_CH1_MV,
        "in_voltage1_offset": OFFSET_CH1})
    (tmp_path / "dev").mkdir()
    return tmp_path, adc


def _config(root, device="larkspur-adc", channels=2, buffer_frames=512):
    return parse_config({
        "source": {"kind": "iio", "device": device, "sample_rate_hz": RATE,
                   "channels": channels, "buffer_frames": buffer_frames,
                   "sysfs_dir": str(root / "sys"), "dev_dir": str(root / "dev")},
        "broker": {"enabled": False},
        "point": [{"name": "fan-3-de", "channel": 0}],
    })


def _frames(n, seed=1):
    rng = np.random.default_rng(seed)
    v0 = rng.integers(-2048, 2048, n)          # 12-bit signed codes
    v1 = rng.integers(0, 2**24, n)             # 24-bit unsigned codes
    blob = bytearray()
    for a, b in zip(v0, v1):
        # element 0: s12 in bits 4..15 of a little-endian 16-bit word, low nibble junk;
        # 2 pad bytes align element 1 to 4 bytes; element 1: big-endian 32-bit word
        # with junk in the 8 bits above the 24 valid ones.  Frame = 8 bytes.
        word0 = ((int(a) & 0xFFF) << 4) | 0xB
        word1 = 0xA5000000 | int(b)
        blob += struct.pack("<H", word0) + b"\xee\xee" + struct.pack(">I", word1)
    return bytes(blob), v0, v1


def _expected_volts(v0, v1):
    # value = (raw + offset) * scale in millivolts (sysfs-bus-iio), /1000 -> volts
    return np.stack([(v0 + 0) * SCALE_SHARED_MV / 1000.0,
                     (v1 + OFFSET_CH1) * SCALE_CH1_MV / 1000.0], axis=1)


def test_frames_are_decoded_scaled_and_sysfs_is_driven(tree):
    root, adc = tree
    blob, v0, v1 = _frames(5000)
    (root / "dev" / "iio:device1").write_bytes(blob)
    src = open_source(_config(root))
    out = np.zeros((5000, 2))
    with src:
        assert _read(adc / "buffer" / "enable") == "1"
        assert src.read(out[:1234]) == 1234
        assert src.read(out[1234:]) == 3766
        assert src.unit == "volt"
        desc = src.describe()
    np.testing.assert_allclose(out, _expected_volts(v0, v1), rtol=1e-12, atol=0)
    scan = adc / "scan_elements"
    assert [_read(scan / f"{c}_en") for c in ("in_voltage0", "in_voltage1", "in_voltage2",
                                              "in_timestamp")] == ["1", "1", "0", "0"]
    assert _read(adc / "sampling_frequency") == str(RATE)
    assert _read(adc / "buffer" / "length") == "512"
    assert _read(adc / "buffer" / "enable") == "0"  # disabled on close
    assert [c["name"] for c in desc["channels_used"]] == ["in_voltage0", "in_voltage1"]


def test_partial_frames_from_a_fifo_are_reassembled(tree):
    root, _ = tree
    blob, v0, v1 = _frames(700, seed=2)
    fifo = root / "dev" / "iio:device1"
    os.mkfifo(fifo)

    def feed():
        with open(fifo, "wb", buffering=0) as fh:
            for i in range(0, len(blob), 13):  # 13 bytes: never a whole number of frames
                fh.write(blob[i:i + 13])

    t = threading.Thread(target=feed)
    t.start()
    out = np.zeros((700, 2))
    with open_source(_config(root)) as src:
        done = 0
        while done < 700:
            done += src.read(out[done:done + 100])
    t.join(10)
    np.testing.assert_allclose(out, _expected_volts(v0, v1), rtol=1e-12, atol=0)


def test_accelerometer_channels_are_in_m_s2(tmp_path):
    _make_adc(tmp_path, "iio:device0", "larkspur-mems", [
        ("in_accel_x", 0, "le:s16/16>>0", 0), ("in_accel_y", 1, "le:s16/16>>0", 0),
        ("in_accel_z", 2, "le:s16/16>>0", 0)], {"in_accel_scale": ACCEL_SCALE})
    (tmp_path / "dev").mkdir()
    raw = np.array([[0, 1], [-32768, 32767], [1000, -1000]], dtype="<i2")
    (tmp_path / "dev" / "iio:device0").write_bytes(raw.tobytes())  # 2 x 2 bytes per frame
    with open_source(_config(tmp_path, device="larkspur-mems")) as src:
        out = np.zeros((3, 2))
        src.read(out)
        assert src.unit == "m_s2"
    # accelerations come out in m/s^2 after (raw + offset) * scale (sysfs-bus-iio)
    np.testing.assert_allclose(out, raw * ACCEL_SCALE, rtol=1e-12)


def test_end_of_data_names_the_device(tree):
    root, _ = tree
    blob, _, _ = _frames(10)
    (root / "dev" / "iio:device1").write_bytes(blob)
    with open_source(_config(root)) as src:
        with pytest.raises(SourceError, match="iio:device1"):
            src.read(np.zeros((11, 2)))


def test_missing_device_lists_what_is_there(tree):
    root, _ = tree
    with pytest.raises(DeviceNotFound) as info:
        open_source(_config(root, device="no-such-adc")).open()
    assert "larkspur-adc" in str(info.value) and "other-adc" in str(info.value)


def test_missing_character_device_names_its_path_and_leaves_buffer_off(tree):
    root, adc = tree
    with pytest.raises(SourceError, match="dev/iio:device1"):
        open_source(_config(root)).open()
    assert _read(adc / "buffer" / "enable") == "0"


def test_too_many_channels_is_an_error(tree):
    root, _ = tree
    with pytest.raises(SourceError, match="3 buffered channels"):
        open_source(_config(root, channels=4)).open()


def test_scan_type_forms():
    # forms from sysfs-bus-iio: [be|le]:[s|u]bits/storagebits[Xrepeat][>>shift]
    assert parse_scan_type("le:s12/16>>4") == ScanType(False, "s", 12, 16, 1, 4)
    assert parse_scan_type("be:u24/32>>0") == ScanType(True, "u", 24, 32, 1, 0)
    assert parse_scan_type("le:s16/16X3>>0") == ScanType(False, "s", 16, 16, 3, 0)
    assert parse_scan_type("le:u8/8") == ScanType(False, "u", 8, 8, 1, 0)
    assert parse_scan_type("le:s48/64>>2").size_bytes == 8  # the ABI's own example
    for bad in ("xx:s12/16", "le:s20/16", "le:s12/12", "le:s14/16>>4", "le:f16/32"):
        with pytest.raises(ValueError):
            parse_scan_type(bad)


def test_listing_and_devices_report(tree):
    root, _ = tree
    found = list_devices(root / "sys")
    assert [d["name"] for d in found] == ["other-adc", "larkspur-adc"]
    assert found[1]["scan_elements"] == ["in_voltage0", "in_voltage1", "in_voltage2",
                                         "in_timestamp"]
    report = devices_report(_config(root))
    assert "*iio:device1  larkspur-adc" in report
