"""tools/sweep, run for real: random bearings through the analysis, judged by the physics.

The expected finding of each simulated fault follows from R. B. Randall,
J. Antoni, "Rolling element bearing diagnostics -- A tutorial", MSSP 25 (2011)
485-520, sec. 2.2 (outer race: even impacts, 1x sidebands under a rotating
load; inner race: 1x sidebands in a stationary load zone; rolling element:
2xBSF with FTF sidebands).  A finding the fault does not explain is a false
alarm; none is allowed.  Some misses are: a defect rate and its sidebands
that sit on whole shaft orders cannot be told from looseness, and two faults
whose lines share a spectrum sometimes hide one another.
"""

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent
SWEEP = REPO / "tools" / "sweep"


def sweep(cases, seed, capture_s=10.0):
    r = subprocess.run([sys.executable, str(SWEEP), "--cases", str(cases), "--seed", str(seed),
                        "--capture-s", str(capture_s), "--json", "--quiet"],
                       capture_output=True, text=True, cwd=REPO, timeout=1200)
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout)


def test_random_bearings_give_their_findings_and_no_false_alarm():
    report = sweep(200, 11)
    c = report["counts"]
    assert c["skipped"] == 0
    assert c["wrong"] == 0, report["failures"]
    assert c["modulation"] == 0, report["failures"]
    assert c["missed"] <= 4, report["failures"]  # at most 2 %
    assert c["ok"] >= 196


def test_short_captures_keep_their_findings_apart():
    # 4 s captures: as fine a resolution but fewer segments averaged, so slip-
    # smeared lines split into ripples; they must not become other defects' lines
    report = sweep(200, 22, capture_s=4.0)
    c = report["counts"]
    assert c["skipped"] == 0
    assert c["wrong"] <= 1, report["failures"]       # at most 0.5 %
    assert c["modulation"] <= 1, report["failures"]
    assert c["missed"] <= 6, report["failures"]      # at most 3 %


@pytest.mark.slow
def test_a_long_sweep_stays_within_its_rates():
    # BALLPASS_SLOW=1: 2000 bearings from another seed
    cases = int(os.environ.get("BALLPASS_SWEEP_CASES", "2000"))
    report = sweep(cases, 100)
    c = report["counts"]
    run = cases - c["skipped"]
    assert c["wrong"] <= 0.002 * run, report["failures"]
    assert c["missed"] + c["modulation"] <= 0.01 * run, report["failures"]


def test_bad_options_exit_2():
    r = subprocess.run([sys.executable, str(SWEEP), "--cases", "0"], capture_output=True,
                       text=True, cwd=REPO, timeout=60)
    assert r.returncode == 2 and "--cases" in r.stderr
