"""The command line end to end, in real subprocesses on real files."""

import json
import subprocess
import sys

import pytest


def ballpass(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "agent", *args], capture_output=True,
                          text=True, cwd=cwd, timeout=120)


@pytest.mark.parametrize("fault,modulation,defect,expect_mod", [
    ("outer", "unbalance", "bpfo", "shaft"),
    ("inner", "gravity", "bpfi", "shaft"),
])
def test_simulate_then_analyze_json(tmp_path, fault, modulation, defect, expect_mod):
    wav = tmp_path / "rec.wav"
    r = ballpass("simulate", "--out", str(wav), "--fault", fault, "--modulation", modulation,
                 "--seconds", "8", "--seed", "5")
    assert r.returncode == 0, r.stderr
    r = ballpass("analyze", str(wav), "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    for key in ("velocity_rms_mm_s", "accel_rms_m_s2", "accel_peak_m_s2", "crest_factor",
                "kurtosis"):
        assert key in d["levels"]
    assert set(d["defects"]) == {"bpfo", "bpfi", "bsf", "ftf"}
    found = {f["defect"]: f for f in d["findings"]}
    # Randall & Antoni 2011, sec. 2.2: a rotating load (unbalance) modulates outer-race
    # impacts at 1x, a stationary load zone modulates inner-race impacts at 1x
    assert set(found) == {defect}
    assert found[defect]["modulation"] == expect_mod
    assert d["quality"] == []


def test_analyze_report_is_readable(tmp_path):
    wav = tmp_path / "healthy.wav"
    assert ballpass("simulate", "--out", str(wav), "--fault", "none", "--seconds", "5",
                    "--seed", "2").returncode == 0
    r = ballpass("analyze", str(wav))
    assert r.returncode == 0
    assert "no bearing defect signature" in r.stdout  # no defect, no signature (common practice)
    assert "mm/s" in r.stdout and "m/s²" in r.stdout
    assert "qualified vibration analyst" in r.stdout


def test_analyze_says_when_a_recording_was_cut_short(tmp_path):
    wav = tmp_path / "rec.wav"
    assert ballpass("simulate", "--out", str(wav), "--fault", "none", "--seconds", "4",
                    "--sample-rate", "25600", "--seed", "3").returncode == 0
    cut = tmp_path / "cut.wav"
    raw = wav.read_bytes()
    cut.write_bytes(raw[:len(raw) // 2])  # the recorder stopped half way
    r = ballpass("analyze", str(cut), "--json")
    assert r.returncode == 0, r.stderr
    assert "ends after 2.0 s of the 4.0 s its header announces" in r.stderr
    assert json.loads(r.stdout)["capture_s"] == pytest.approx(2.0, abs=0.01)
    r = ballpass("analyze", str(wav))
    assert r.returncode == 0 and r.stderr == ""


def test_bearing_command_published_factors():
    r = ballpass("bearing", "--balls", "9", "--ball-diameter-mm", "7.94",
                 "--pitch-diameter-mm", "39.04", "--shaft-hz", "30", "--json")
    assert r.returncode == 0
    d = json.loads(r.stdout)
    # published factors of a public test-rig bearing (from memory)
    assert d["orders"]["bpfo"] == pytest.approx(3.5848, abs=1e-4)
    assert d["orders"]["bpfi"] == pytest.approx(5.4152, abs=1e-4)
    assert d["orders"]["bsf2"] == pytest.approx(4.7135, abs=1e-4)
    assert d["orders"]["ftf"] == pytest.approx(0.3983, abs=1e-4)


def test_user_mistakes_give_clear_errors_no_traceback(tmp_path):
    r = ballpass("analyze", str(tmp_path / "missing.wav"))
    assert r.returncode == 2 and "missing.wav" in r.stderr and "Traceback" not in r.stderr
    junk = tmp_path / "junk.wav"
    junk.write_bytes(b"not a wav file at all")
    r = ballpass("analyze", str(junk))
    assert r.returncode == 2 and "Traceback" not in r.stderr
    r = ballpass("analyze", str(junk), "--point", "nope")
    assert r.returncode == 2
