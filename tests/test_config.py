"""Configuration: every problem reported at once, exit code 2, safe defaults."""

import subprocess
import sys
from pathlib import Path

import pytest

from agent.config import load_config, parse_config
from agent.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]


def test_example_config_loads_with_every_key():
    cfg = load_config(ROOT / "config" / "example.toml")
    assert cfg.source.kind == "soundcard"
    assert [p.name for p in cfg.points] == ["raw-water-pump-2-de", "raw-water-pump-2-nde"]
    # 100 mV/g over standard gravity 9.80665 m/s² (CGPM 1901 conventional value)
    assert cfg.points[0].sensitivity_mv_per_m_s2 == pytest.approx(100 / 9.80665)


def test_builtin_defaults_load():
    cfg = load_config()
    assert cfg.source.kind == "simulated"
    assert cfg.broker.is_loopback


def test_all_problems_at_once_with_key_value_and_allowed():
    data = {
        "source": {"kind": "usb", "sample_rate_hz": -3},
        "broker": {"host": "10.1.2.3"},
        "point": [{"name": "a b", "channel": 3, "machine": {"shaft_hz": 0},
                   "bearing": {"balls": 2}}],
        "foo": 1,
    }
    with pytest.raises(ConfigError) as exc:
        parse_config(data, origin="x.toml")
    text = "\n".join(exc.value.problems)
    for needle in ("source.kind = 'usb'", "'soundcard'", "source.sample_rate_hz = -3",
                   "point[0].name = 'a b'", "point[0].machine.shaft_hz = 0",
                   "point[0].bearing.balls = 2", "foo: unknown key", "broker.tls must be true"):
        assert needle in text
    assert len(exc.value.problems) >= 7


def test_plaintext_to_remote_broker_needs_explicit_consent():
    cfg = parse_config({"broker": {"host": "broker.larkspur.example", "allow_plaintext": True}})
    assert not cfg.broker.tls
    cfg = parse_config({"broker": {"host": "broker.larkspur.example", "tls": True}})
    assert cfg.broker.port == 8883


def test_bearing_geometry_or_orders_not_both():
    with pytest.raises(ConfigError, match="not both"):
        parse_config({"point": [{"name": "p", "bearing": {"balls": 9, "bpfo": 3.58}}]})
    cfg = parse_config({"point": [{"name": "p", "bearing": {
        "bpfo": 3.5848, "bpfi": 5.4152, "bsf": 2.3568, "ftf": 0.3983}}]})
    assert cfg.points[0].bearing.orders.bpfi == pytest.approx(5.4152)


def test_cli_exit_code_2_lists_every_problem(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text('[source]\nkind = "x"\n[[point]]\nname = "a"\nchannel = 4\n')
    r = subprocess.run([sys.executable, "-m", "agent", "bearing", "--balls", "2",
                        "--ball-diameter-mm", "7", "--pitch-diameter-mm", "30"],
                       capture_output=True, text=True)
    assert r.returncode == 2 and "balls" in r.stderr and "Traceback" not in r.stderr
    wav = tmp_path / "r.wav"
    wav.write_bytes(b"")
    r = subprocess.run([sys.executable, "-m", "agent", "analyze", str(wav), "--config", str(bad)],
                       capture_output=True, text=True)
    assert r.returncode == 2
    assert "source.kind = 'x'" in r.stderr and "point[0].channel = 4" in r.stderr
    assert "Traceback" not in r.stderr
