"""Alert engine and baselines: state machine, ISO zones, baselines on real files.

The analysis dicts are hand-made (invented plant "Larkspur Water Works");
only the zone boundaries and the robust statistic are outside facts.
"""

import json
import logging
import statistics

import pytest

from agent.alerts import ACT, CAUTION, NORMAL, WATCH, AlertChange, AlertEngine, state_rank
from agent.baseline import BASELINE_INDICATORS, BaselineStore, reset_baselines
from agent.config import parse_config
from agent.dsp.iso import iso_zone
from agent.findings import modulation_meaning

POINT = "raw-water-pump-2-de"


def make(limits=None, point_name=POINT, machine=None, **alerts):
    """A validated point and alert settings through the real config parser."""
    point = {"name": point_name}
    if limits:
        point["limits"] = limits
    if machine:
        point["machine"] = machine
    config = parse_config({"alerts": alerts, "point": [point]})
    return config.points[0], config.alerts


def capture(velocity_mm_s=1.0, accel_m_s2=1.0, *, zone=None, quality=(), findings=(),
            defects=None, crest=3.0, kurt=3.0, point=POINT, group=2, support="rigid"):
    """A hand-made analysis dict in the shape of ``Analysis.to_dict()``."""
    return {
        "point": point, "capture_s": 10.0, "sample_rate_hz": 51200,
        "levels": {"accel_rms_m_s2": accel_m_s2, "accel_peak_m_s2": accel_m_s2 * crest,
                   "crest_factor": crest, "kurtosis": kurt,
                   "velocity_rms_mm_s": velocity_mm_s, "velocity_band_hz": [10.0, 1000.0],
                   "iso_zone": zone or iso_zone(velocity_mm_s, group, support)},
        "shaft_hz": 24.8, "shaft_hz_nominal": 24.75,
        "envelope": {"band_hz": [2000.0, 4000.0], "band_source": "auto", "resolution_hz": 0.78},
        "quality": list(quality),
        "defects": defects or {
            k: {"expected_hz": f, "found_hz": None, "amplitude": 0.01, "snr_db": 1.0,
                "harmonics": 0, "sideband_ratio": None, "modulation_hz": None}
            for k, f in (("bpfo", 78.6), ("bpfi", 119.4), ("bsf", 66.0), ("ftf", 9.8))},
        "findings": list(findings),
    }


def bpfo_defects(snr_db, harmonics, amplitude=0.12):
    d = capture()["defects"]
    d["bpfo"] = {"expected_hz": 78.6, "found_hz": 78.9, "amplitude": amplitude,
                 "snr_db": snr_db, "harmonics": harmonics, "sideband_ratio": 0.35,
                 "modulation_hz": 24.8}
    return d


BPFO_FINDING = {"defect": "bpfo", "severity": "high", "modulation": "shaft",
                "text": "Outer-race defect signature."}


def run(engine, analyses):
    """Feed captures; return the state after each and the changes."""
    states, changes = [], []
    for a in analyses:
        change = engine.update(a)
        if change is not None:
            changes.append(change)
        states.append(engine.state)
    return states, changes


# ----------------------------------------------------------------- ISO zones
def test_iso_zone_boundaries_drive_watch_and_act():
    point, settings = make(raise_after=1, clear_after=1, baseline_captures=0)
    engine = AlertEngine(point, settings, None)
    # from memory: ISO 20816-3 group 2 rigid 1.4/2.8/4.5 mm/s
    assert engine.zone_limits_mm_s == (1.4, 2.8, 4.5)
    assert engine.update(capture(2.79)) is None      # zone B: normal
    change = engine.update(capture(2.8))             # zone C starts at 2.8 mm/s
    assert (change.state, change.previous) == (WATCH, NORMAL)
    iso = [r for r in change.reasons if r["limit_kind"] == "iso_zone"]
    assert iso == [{"indicator": "velocity_rms_mm_s", "value": 2.8, "limit": 2.8,
                    "limit_kind": "iso_zone", "text": iso[0]["text"]}]
    assert "zone C" in iso[0]["text"] and "2.8 mm/s" in iso[0]["text"]
    change = engine.update(capture(4.5))             # zone D starts at 4.5 mm/s
    assert (change.state, change.previous) == (ACT, WATCH)
    assert change.reasons[0]["limit"] == 4.5         # from memory: ISO 20816-3 group 2 rigid C/D 4.5 mm/s
    assert "zone D" in change.text


def test_flexible_support_uses_its_own_boundaries():
    point, settings = make(raise_after=1, baseline_captures=0,
                           machine={"iso_group": 2, "support": "flexible"})
    engine = AlertEngine(point, settings, None)
    # from memory: ISO 20816-3 group 2 flexible 2.3/4.5/7.1 mm/s
    assert engine.zone_limits_mm_s == (2.3, 4.5, 7.1)
    assert engine.update(capture(4.0, support="flexible")) is None
    assert engine.update(capture(4.5, support="flexible")).state == WATCH


# ------------------------------------------------------- debounce/hysteresis
def test_raise_needs_consecutive_captures():
    point, settings = make(raise_after=3, clear_after=2, baseline_captures=0)
    engine = AlertEngine(point, settings, None)
    states, changes = run(engine, [capture(3.0), capture(3.0), capture(1.0),   # run broken
                                   capture(3.0), capture(3.0), capture(3.0)])
    assert states == [NORMAL] * 5 + [WATCH]
    assert [(c.previous, c.state) for c in changes] == [(NORMAL, WATCH)]


def test_raise_goes_to_the_lowest_level_of_the_run():
    point, settings = make(raise_after=2, baseline_captures=0)
    engine = AlertEngine(point, settings, None)
    states, _ = run(engine, [capture(3.0), capture(5.0), capture(5.0)])
    assert states == [NORMAL, WATCH, ACT]


def test_hysteresis_holds_act_until_below_fraction_of_limit():
    point, settings = make(raise_after=1, clear_after=2, hysteresis=0.9, baseline_captures=0)
    engine = AlertEngine(point, settings, None)
    assert engine.update(capture(5.0)).state == ACT
    # 4.3 mm/s is zone C but above 0.9 x 4.5 = 4.05 mm/s: act is held
    states, changes = run(engine, [capture(4.3)] * 5)
    assert states == [ACT] * 5 and changes == []
    # 4.0 mm/s is below 4.05: two captures later the state falls to watch
    states, changes = run(engine, [capture(4.0), capture(4.0)])
    assert states == [ACT, WATCH]
    assert (changes[0].previous, changes[0].state) == (ACT, WATCH)
    # 2.6 mm/s is zone B but above 0.9 x 2.8 = 2.52: watch is held
    states, _ = run(engine, [capture(2.6)] * 4)
    assert states == [WATCH] * 4
    states, changes = run(engine, [capture(2.5), capture(2.5)])
    assert states == [WATCH, NORMAL]
    assert changes[0].reasons == [] and "back to normal" in changes[0].text


def test_hysteresis_does_not_speed_up_a_raise():
    point, settings = make(raise_after=2, hysteresis=0.9, baseline_captures=0)
    engine = AlertEngine(point, settings, None)
    # one capture in zone D, then one just under the C/D boundary: only watch
    states, _ = run(engine, [capture(5.0), capture(4.4)])
    assert states == [NORMAL, WATCH]


def test_clear_run_is_reset_by_a_high_capture():
    point, settings = make(raise_after=1, clear_after=3, baseline_captures=0)
    engine = AlertEngine(point, settings, None)
    engine.update(capture(3.0))
    states, _ = run(engine, [capture(1.0), capture(1.0), capture(3.0),
                             capture(1.0), capture(1.0), capture(1.0)])
    assert states == [WATCH] * 5 + [NORMAL]


# -------------------------------------------------------- quality flags
def test_flagged_capture_never_changes_state(tmp_path):
    point, settings = make(raise_after=1, clear_after=1, baseline_captures=3)
    store = BaselineStore(tmp_path)
    engine = AlertEngine(point, settings, store)
    for flag in ("clipped", "flat", "dc_offset", "overrun", "wrong_rate", "too_short", "nonfinite"):
        assert engine.update(capture(9.0, quality=[flag])) is None
        assert engine.state == NORMAL
    assert store.progress(POINT) == 0                 # not learnt either
    assert engine.update(capture(9.0)).state == ACT
    for flag in ("clipped", "flat"):
        assert engine.update(capture(0.5, quality=[flag])) is None
        assert engine.state == ACT


def test_flagged_capture_does_not_count_in_debounce():
    point, settings = make(raise_after=2, baseline_captures=0)
    engine = AlertEngine(point, settings, None)
    states, _ = run(engine, [capture(3.0), capture(9.0, quality=["clipped"]), capture(3.0)])
    assert states == [NORMAL, NORMAL, WATCH]


# ------------------------------------------------------------- absolute
def test_absolute_limits_of_the_point():
    point, settings = make(raise_after=1, clear_after=1, baseline_captures=0,
                           limits={"accel_rms_watch_m_s2": 5.0, "accel_rms_act_m_s2": 10.0,
                                   "crest_factor_watch": 6.0, "kurtosis_watch": 8.0})
    engine = AlertEngine(point, settings, None)
    change = engine.update(capture(1.0, crest=7.0))
    assert change.state == WATCH
    assert change.reasons[0]["indicator"] == "crest_factor"
    assert change.reasons[0]["limit_kind"] == "absolute" and change.reasons[0]["limit"] == 6.0
    change = engine.update(capture(1.0, accel_m_s2=12.0))
    assert change.state == ACT
    assert change.reasons[0] == {**change.reasons[0], "indicator": "accel_rms_m_s2",
                                 "value": 12.0, "limit": 10.0, "limit_kind": "absolute"}
    assert "m/s² RMS" in change.text


# --------------------------------------------------------------- defects
def test_defect_evidence_watch_and_act_rules():
    point, settings = make(raise_after=1, clear_after=1, baseline_captures=0,
                           defect_watch_snr_db=10.0, defect_act_snr_db=20.0)
    engine = AlertEngine(point, settings, None)
    # strong line but only 2 harmonics: watch, not act
    change = engine.update(capture(defects=bpfo_defects(25.0, 2), findings=[BPFO_FINDING]))
    assert change.state == WATCH
    # no finding: the defect dict alone is not evidence
    assert engine.update(capture(defects=bpfo_defects(25.0, 5))).state == NORMAL
    change = engine.update(capture(defects=bpfo_defects(18.2, 5), findings=[BPFO_FINDING]))
    assert change.state == WATCH and change.reasons[0]["limit"] == 10.0
    assert ("Outer-race defect signature (BPFO 78.9 Hz, 5 harmonics, 18 dB over the noise floor) "
            "with sidebands at shaft speed: the impacts swell and fade once per turn, so the load "
            "turns with the shaft, typically unbalance; watch from 10 dB" in change.text)
    change = engine.update(capture(defects=bpfo_defects(22.0, 5), findings=[BPFO_FINDING]))
    assert change.state == ACT
    assert change.reasons[0] == {**change.reasons[0], "indicator": "bpfo_snr_db",
                                 "value": 22.0, "limit": 20.0, "limit_kind": "defect"}


def test_rolling_element_text_names_the_defect_rate():
    point, settings = make(raise_after=1, baseline_captures=0)
    engine = AlertEngine(point, settings, None)
    defects = capture()["defects"]
    defects["bsf"] = {"expected_hz": 66.0, "found_hz": 66.2, "amplitude": 0.05, "snr_db": 14.0,
                      "harmonics": 3, "sideband_ratio": 0.4, "modulation_hz": 9.8}
    finding = {"defect": "bsf", "severity": "medium", "modulation": "cage", "text": "x"}
    change = engine.update(capture(defects=defects, findings=[finding]))
    # the rolling-element defect repeats at 2 x the ball spin frequency (bearing.py convention)
    assert "Rolling-element defect signature (2xBSF 66.2 Hz" in change.text
    assert "a damaged rolling element is carried through the load zone" in change.text


def test_inner_race_text_says_what_even_impacts_mean():
    # facts of the trade (load-zone modulation): a load that turns with the shaft
    # (unbalance) strikes an inner-race defect equally on every turn, so no 1x
    # sidebands; a stationary load zone modulates it at 1x
    point, settings = make(raise_after=1, baseline_captures=0)
    defects = capture()["defects"]
    defects["bpfi"] = {"expected_hz": 119.4, "found_hz": 119.5, "amplitude": 0.3, "snr_db": 24.0,
                       "harmonics": 6, "sideband_ratio": 0.05, "modulation_hz": 24.7}
    texts = {}
    for modulation in ("none", "shaft"):
        engine = AlertEngine(point, settings, None)
        finding = {"defect": "bpfi", "severity": "high", "modulation": modulation, "text": "x"}
        texts[modulation] = engine.update(capture(defects=defects, findings=[finding])).text
    assert "no shaft-rate sidebands: the load turns with the inner race" in texts["none"]
    assert "turns with the shaft through a stationary load zone" in texts["shaft"]
    # one wording: the alert says what the analysis report says
    for modulation, text in texts.items():
        assert modulation_meaning("bpfi", modulation) in text


def test_unresolved_sidebands_are_not_read_as_even_impacts():
    # from memory: a Hann-windowed line spans +-2 bins, so sidebands 1x = 24.7 Hz
    # away cannot be told from it at 12.5 Hz bins; "no sidebands" would then be a
    # claim the spectrum cannot back
    point, settings = make(raise_after=1, baseline_captures=0)
    analysis = capture()
    analysis["envelope"] = {"band_hz": [2000.0, 6000.0], "band_source": "config",
                            "band_kurtosis": None, "resolution_hz": 12.5, "segments": 3}
    analysis["defects"]["bpfi"] = {"expected_hz": 119.4, "found_hz": 119.5, "amplitude": 0.3,
                                   "snr_db": 24.0, "harmonics": 6, "sideband_ratio": None,
                                   "modulation_hz": 24.7}
    analysis["findings"] = [{"defect": "bpfi", "severity": "high", "modulation": "none",
                             "text": "x"}]
    text = AlertEngine(point, settings, None).update(analysis).text
    assert modulation_meaning("bpfi", "none", resolved=False) in text
    assert "capture is too short" in text
    assert "no shaft-rate sidebands" not in text


# -------------------------------------------------------------- baseline
def test_baseline_learnt_as_median_and_persisted(tmp_path):
    point, settings = make(raise_after=1, clear_after=1, baseline_captures=5,
                           baseline_watch_ratio=2.0, baseline_act_ratio=4.0)
    velocities = [0.50, 0.52, 0.48, 2.0, 0.51]       # one odd capture among five
    accels = [1.0, 1.1, 0.9, 1.05, 0.95]
    engine = AlertEngine(point, settings, BaselineStore(tmp_path))
    assert engine.baseline is None
    for v, a in zip(velocities, accels):
        engine.update(capture(v, a))
    engine.update(capture(0.7, 1.0, quality=["clipped"]))     # ignored
    base = engine.baseline
    assert base.captures == 5
    # reference: statistics.median (the standard library's robust middle value)
    assert base.values["velocity_rms_mm_s"] == pytest.approx(statistics.median(velocities))
    assert base.values["accel_rms_m_s2"] == pytest.approx(statistics.median(accels))
    assert set(base.values) == set(BASELINE_INDICATORS)

    files = sorted(p.name for p in (tmp_path / "baselines").iterdir())
    assert files == [f"{POINT}.json"]                 # no temporary file left behind
    on_disk = json.loads((tmp_path / "baselines" / f"{POINT}.json").read_text())
    assert on_disk["baseline"]["velocity_rms_mm_s"] == pytest.approx(0.51)

    # a new store and engine (a restart) use the learnt baseline
    engine2 = AlertEngine(point, settings, BaselineStore(tmp_path))
    assert engine2.baseline == base
    assert engine2.update(capture(1.0, 1.0)) is None          # 1.96 x: below watch
    change = engine2.update(capture(1.1, 1.0))                # 2.16 x: watch
    assert change.state == WATCH
    reason = [r for r in change.reasons if r["limit_kind"] == "baseline"][0]
    assert reason["indicator"] == "velocity_rms_mm_s" and reason["limit"] == pytest.approx(1.02)
    assert "learnt baseline of 0.51 mm/s" in reason["text"]
    change = engine2.update(capture(2.1, 1.0))                # 4.1 x: act (zone B still)
    assert change.state == ACT and change.reasons[0]["limit_kind"] == "baseline"


def test_defect_amplitude_ratio_counts_only_found_lines(tmp_path):
    point, settings = make(raise_after=1, baseline_captures=2)
    engine = AlertEngine(point, settings, BaselineStore(tmp_path))
    run(engine, [capture(defects=bpfo_defects(3.0, 1, amplitude=0.01))] * 2)
    assert engine.baseline.values["bpfo_amplitude"] == pytest.approx(0.01)
    # the line found at 5 x its baseline amplitude, but SNR under the defect rules
    change = engine.update(capture(defects=bpfo_defects(5.0, 1, amplitude=0.05)))
    assert change.state == ACT
    assert change.reasons[0]["indicator"] == "bpfo_amplitude"
    # the same amplitude where no line was found is not judged
    engine3 = AlertEngine(point, settings, BaselineStore(tmp_path))
    noisy = capture(defects={k: {**v, "amplitude": 0.05} for k, v in capture()["defects"].items()})
    assert engine3.update(noisy) is None


def test_reset_baselines(tmp_path):
    pump, settings = make(baseline_captures=2)
    fan, _ = make(point_name="supply-fan-1-de", baseline_captures=2)
    store = BaselineStore(tmp_path)
    for point in (pump, fan):
        engine = AlertEngine(point, settings, store)
        run(engine, [capture(point=point.name)] * 2)
    assert reset_baselines(tmp_path, "supply-fan-1-de") == ["supply-fan-1-de"]
    fresh = BaselineStore(tmp_path)
    assert fresh.get("supply-fan-1-de") is None and fresh.get(POINT) is not None
    assert reset_baselines(tmp_path) == [POINT]
    assert reset_baselines(tmp_path) == []
    assert BaselineStore(tmp_path).load() == {POINT: None, "supply-fan-1-de": None}


def test_alert_state_survives_a_restart(tmp_path):
    point, settings = make(raise_after=1, clear_after=1, baseline_captures=0)
    engine = AlertEngine(point, settings, BaselineStore(tmp_path))
    engine.update(capture(5.0))
    engine2 = AlertEngine(point, settings, BaselineStore(tmp_path))
    assert engine2.state == ACT
    assert engine2.update(capture(4.3)) is None       # hysteresis holds across the restart
    change = engine2.update(capture(1.0))
    assert (change.previous, change.state) == (ACT, NORMAL)
    reset_baselines(tmp_path)
    assert BaselineStore(tmp_path).alert_state(POINT) == NORMAL


def test_unreadable_baseline_file_is_relearnt(tmp_path, caplog):
    folder = tmp_path / "baselines"
    folder.mkdir()
    (folder / f"{POINT}.json").write_text("{not json")
    with caplog.at_level(logging.WARNING, logger="agent.baseline"):
        assert BaselineStore(tmp_path).load() == {}
    assert "will learn again" in caplog.text


# ----------------------------------------------------------- the change
def test_change_carries_caution_and_serialises():
    point, settings = make(raise_after=1, baseline_captures=0)
    change = AlertEngine(point, settings, None).update(capture(5.0))
    assert isinstance(change, AlertChange)
    assert change.caution == CAUTION
    for words in ("qualified vibration analyst", "lock-out/tag-out", "guarding",
                  "Local codes and licensed practice take precedence"):
        assert words in change.caution
    d = change.to_dict()
    assert set(d) == {"point", "state", "previous", "reasons", "text", "caution"}
    assert json.loads(json.dumps(d)) == d
    assert d["text"].startswith(f"{POINT}: alert raised from normal to act.")


def test_bad_inputs_raise_value_error(tmp_path):
    point, settings = make()
    engine = AlertEngine(point, settings, None)
    with pytest.raises(ValueError, match="analysis"):
        engine.update([1, 2])
    with pytest.raises(ValueError, match="supply-fan"):
        engine.update(capture(point="supply-fan-1-de"))
    with pytest.raises(ValueError, match="captures_needed"):
        BaselineStore(tmp_path).learn(POINT, capture(), -1)
    with pytest.raises(ValueError, match="state"):
        BaselineStore(tmp_path).set_alert_state(POINT, "alarm")
    with pytest.raises(ValueError, match="point"):
        BaselineStore(tmp_path).get("../etc")
    with pytest.raises(ValueError, match="state"):
        state_rank("alarm")
    assert [state_rank(s) for s in (NORMAL, WATCH, ACT)] == [0, 1, 2]


def test_reset_reaches_a_running_engine(tmp_path):
    point, settings = make(raise_after=1, clear_after=1, baseline_captures=2)
    running = AlertEngine(point, settings, BaselineStore(tmp_path))
    run(running, [capture(0.5)] * 2)
    assert running.baseline.values["velocity_rms_mm_s"] == pytest.approx(0.5)
    assert running.update(capture(1.2)).state == WATCH        # 2.4 x the baseline
    # `ballpass baseline --reset` from another process while the daemon runs
    assert reset_baselines(tmp_path) == [POINT]
    assert BaselineStore(tmp_path).alert_state(POINT) == WATCH   # the state is kept
    assert running.baseline is None
    change = running.update(capture(1.2))                     # learning again, nothing to compare
    assert (change.previous, change.state) == (WATCH, NORMAL)
    fresh = BaselineStore(tmp_path)
    assert fresh.progress(POINT) == 1 and fresh.get(POINT) is None   # old baseline not written back
