"""Topics, payload bodies and their JSON Schemas.

References used below: the MQTT 5.0 / 3.1.1 topic rules (OASIS, section 4.7),
paho-mqtt's ``topic_matches_sub`` as the reference topic matcher, Python's
``datetime.isoformat`` for ISO 8601, numpy's ``format_float_positional`` for
significant-figure rounding, and ``jsonschema`` (draft 2020-12) as the
reference validator.
"""

import copy
import json
import math
from dataclasses import dataclass
from datetime import datetime, timezone

import jsonschema
import numpy as np
import pytest
from paho.mqtt.client import topic_matches_sub

from agent import payloads, topics
from agent.outbox import Outbox

AGENT, SITE, POINT = "pumphouse-a", "larkspur-water-works", "raw-water-pump-2-de"


# --------------------------------------------------------------------------- helpers
def validate(kind, body):
    schema = payloads.load_schema(kind)
    jsonschema.Draft202012Validator(schema).validate(body)


def stored(tmp_path, kind, body, topic="ballpass/larkspur-water-works/pumphouse-a/x"):
    """The payload as the outbox stores it (with its seq), decoded."""
    with Outbox(tmp_path / f"{kind}.db") as ob:
        ob.enqueue(kind, topic, body)
        (msg,) = ob.peek(1)
    return msg.payload, json.loads(msg.payload)


def defect(expected, found, amplitude, snr, harmonics, sideband, modulation):
    return {"expected_hz": expected, "found_hz": found, "amplitude": amplitude, "snr_db": snr,
            "harmonics": harmonics, "sideband_ratio": sideband, "modulation_hz": modulation}


def analysis(findings=True, quality=()):
    """An analysis dict in the shape of the pipeline contract, all four defects found."""
    text = ("Outer-race defect signature at 78.9 Hz with 5 harmonics 18.2 dB above the local "
            "noise floor and sidebands at shaft speed (24.8 Hz); amplitude rising since last week.")
    return {
        "point": POINT, "capture_s": 10.0, "sample_rate_hz": 51200,
        "levels": {"accel_rms_m_s2": 12.3456, "accel_peak_m_s2": 181.234, "crest_factor": 14.6789,
                   "kurtosis": 15.234, "velocity_rms_mm_s": 11.234,
                   "velocity_band_hz": [10.0, 1000.0], "iso_zone": "D"},
        "shaft_hz": 24.8123, "shaft_hz_nominal": 24.75,
        "envelope": {"band_hz": [2000.0, 4000.0], "band_source": "auto", "resolution_hz": 0.78},
        "quality": list(quality),
        "defects": {"bpfo": defect(78.6123, 78.9234, 0.0123456, 18.234, 5, 0.35123, 24.8123),
                    "bpfi": defect(122.134, 121.876, 0.000123456, 22.345, 8, 0.4567, 24.8123),
                    "bsf": defect(103.456, 104.123, 0.00234, 12.345, 3, 0.25, 9.8234),
                    "ftf": defect(9.8123, 9.7865, 0.0000123, 10.123, 2, 0.123, None)},
        "findings": [{"defect": d, "severity": s, "modulation": m, "text": text}
                     for d, s, m in (("bpfo", "high", "shaft"), ("bpfi", "medium", "shaft"),
                                     ("bsf", "low", "cage"), ("ftf", "low", "none"))]
        if findings else [],
    }


# --------------------------------------------------------------------------- topics
def test_topics_have_the_documented_shape():
    t = topics.Topics("ballpass", SITE, AGENT)
    base = f"ballpass/{SITE}/{AGENT}"
    assert t.status == f"{base}/status"
    assert t.result(POINT) == f"{base}/points/{POINT}/result"
    assert t.alert(POINT) == f"{base}/points/{POINT}/alert"
    assert t.spectrum(POINT) == f"{base}/points/{POINT}/spectrum"
    assert t.for_kind("status") == t.status
    assert t.for_kind("result", POINT) == t.result(POINT)


def test_subscription_matches_every_topic_of_the_agent():
    # Reference matcher: paho-mqtt's topic_matches_sub (MQTT 5.0 section 4.7.1 wildcards).
    t = topics.Topics("ballpass", SITE, AGENT)
    ours = [t.status] + [t.point(POINT, k) for k in topics.POINT_KINDS]
    for sub in (topics.subscription("ballpass"), topics.subscription("ballpass", SITE),
                topics.subscription("ballpass", SITE, AGENT)):
        assert all(topic_matches_sub(sub, topic) for topic in ours), sub
    assert not topic_matches_sub(topics.subscription("ballpass", "other-site"), t.status)
    assert not topic_matches_sub(topics.subscription("other"), t.status)
    for kind in ("status",) + topics.POINT_KINDS:
        sub = topics.subscription("ballpass", kind=kind)
        assert [topic_matches_sub(sub, topic) for topic in ours] == [
            topic.endswith("/" + kind) for topic in ours], sub
    with pytest.raises(ValueError):
        topics.subscription("ballpass", kind="points")


def test_parse_reverses_the_builders():
    t = topics.Topics("ballpass", SITE, AGENT)
    assert topics.parse("ballpass", t.status) == topics.TopicParts(SITE, AGENT, "status")
    for kind in topics.POINT_KINDS:
        assert topics.parse("ballpass", t.point(POINT, kind)) == topics.TopicParts(SITE, AGENT, kind, POINT)
    for foreign in ("ballpass/a/b", "ballpass/a/b/points/p/other", "other/a/b/status",
                    "ballpass/a//status", "ballpass/a/b/status/x"):
        assert topics.parse("ballpass", foreign) is None


@pytest.mark.parametrize("bad", ["", "a/b", "a+", "#", "a b", "tab\tname", "nul\0", 5, None])
def test_every_level_is_checked(bad):
    # MQTT 5.0 section 4.7: '/' separates levels, '+' and '#' are wildcards, NUL is forbidden;
    # white space is refused by us (it breaks shell tools and dashboards).  # common practice
    with pytest.raises(ValueError):
        topics.Topics(bad, SITE, AGENT)
    with pytest.raises(ValueError):
        topics.Topics("ballpass", bad, AGENT)
    with pytest.raises(ValueError):
        topics.Topics("ballpass", SITE, bad)
    with pytest.raises(ValueError):
        topics.Topics("ballpass", SITE, AGENT).result(bad)


def test_prefix_must_not_be_a_broker_topic():
    # MQTT 5.0 section 4.7.2: topics starting with '$' are for the server's own use ($SYS).
    with pytest.raises(ValueError, match="prefix"):
        topics.Topics("$SYS", SITE, AGENT)
    with pytest.raises(ValueError, match="kind"):
        topics.Topics("ballpass", SITE, AGENT).point(POINT, "status")
    with pytest.raises(ValueError):
        topics.Topics("ballpass", SITE, AGENT).for_kind("status", POINT)


# --------------------------------------------------------------------------- primitives
@pytest.mark.parametrize("t", [0.0, 1796196404.123, 1796196404.9999, 1e9 + 0.0005, -0.25])
def test_timestamp_matches_datetime_isoformat(t):
    # Reference: Python's datetime.isoformat(timespec="milliseconds") (ISO 8601).
    ref = datetime.fromtimestamp(t, tz=timezone.utc).isoformat(timespec="milliseconds")
    assert payloads.utc_timestamp(t) == ref.replace("+00:00", "Z")


def test_timestamp_example():
    # The documented example of the message contract.  # from the contract text
    assert payloads.utc_timestamp(1796196404.123) == "2026-12-02T07:26:44.123Z"
    with pytest.raises(ValueError):
        payloads.utc_timestamp(float("nan"))


@pytest.mark.parametrize("x", [78.6123, 0.000123456, 51234.0, 9.995, -0.0012345, 1.0, 999.5,
                               123456789.0, 2.5e-7, 0.1 + 0.2])
def test_round_sig_matches_numpy(x):
    # Reference: numpy.format_float_positional(precision=3, fractional=False) rounds to
    # 3 significant digits.
    ref = float(np.format_float_positional(x, precision=3, unique=False, fractional=False, trim="-"))
    assert payloads.round_sig(x) == ref
    assert len(repr(float(payloads.round_sig(x))).replace("-", "").replace(".", "")
               .split("e")[0].strip("0")) <= 3


def test_round_sig_whole_numbers_and_non_finite():
    assert payloads.round_sig(51200.0) == 51200 and isinstance(payloads.round_sig(51200.0), int)
    assert payloads.round_sig(120.3) == 120 and isinstance(payloads.round_sig(120.3), int)
    assert payloads.round_sig(None) is None
    assert payloads.round_sig(float("nan")) is None
    assert payloads.round_sig(float("inf")) is None


def test_encode_is_compact_json():
    # RFC 8259: NaN is not a JSON value; compact separators carry no spaces.  # common practice
    raw = payloads.encode({"a": [1, 2.5], "u": "(m/s²)²", "b": None})
    assert raw == '{"a":[1,2.5],"u":"(m/s²)²","b":null}'.encode("utf-8")
    assert json.loads(raw) == {"a": [1, 2.5], "u": "(m/s²)²", "b": None}
    with pytest.raises(ValueError):
        payloads.encode({"x": float("nan")})
    with pytest.raises(ValueError):
        payloads.encode({"x": object()})


# --------------------------------------------------------------------------- schemas
@pytest.mark.parametrize("kind", payloads.KINDS)
def test_schemas_are_valid_draft_2020_12(kind):
    schema = payloads.load_schema(kind)
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    jsonschema.Draft202012Validator.check_schema(schema)
    assert schema["properties"]["schema"] == {"const": f"ballpass.{kind}/1"}
    assert schema["additionalProperties"] is False


# --------------------------------------------------------------------------- result
def test_result_without_findings_is_complete_and_valid(tmp_path):
    body = payloads.result(analysis(findings=False, quality=["clipped", "dc_offset", "overrun"]),
                           agent=AGENT, site=SITE, alert_state="watch", ts=1796196404.123)
    raw, msg = stored(tmp_path, "result", body)
    validate("result", msg)
    assert len(raw) < 1024  # contract: a result message stays under 1 KiB
    assert "trimmed" not in msg
    assert msg["seq"] == 1 and msg["ts"] == "2026-12-02T07:26:44.123Z"
    assert msg["schema"] == "ballpass.result/1" and msg["point"] == POINT and msg["alert"] == "watch"
    assert msg["defects"]["bpfo"] == {"expected_hz": 78.6, "found_hz": 78.9, "amplitude": 0.0123,
                                      "snr_db": 18.2, "harmonics": 5, "sideband_ratio": 0.351,
                                      "modulation_hz": 24.8}
    assert msg["levels"]["velocity_band_hz"] == [10, 1000]
    assert msg["quality"] == ["clipped", "dc_offset", "overrun"]
    assert "envelope" not in msg and "capture_s" not in msg


def test_worst_case_result_stays_under_1_kib(tmp_path):
    # Worst case: four defects found, four findings with long texts, a large seq.
    body = payloads.result(analysis(findings=True), agent=AGENT, site=SITE, alert_state="act")
    raw = payloads.encode(dict(body, seq=2**32 - 1))
    assert len(raw) < 1024  # contract: a result message stays under 1 KiB
    assert body["trimmed"] is True
    validate("result", json.loads(raw))
    assert [f["defect"] for f in body["findings"]] == ["bpfo", "bpfi", "bsf", "ftf"]
    assert [f["severity"] for f in body["findings"]] == ["high", "medium", "low", "low"]
    _, msg = stored(tmp_path, "result", body)
    validate("result", msg)


def test_result_with_one_finding_keeps_a_shortened_text():
    a = analysis(findings=True)
    a["findings"] = a["findings"][:1]
    a["defects"] = {k: dict(d, found_hz=None) for k, d in a["defects"].items() if k != "bpfo"} | \
        {"bpfo": a["defects"]["bpfo"]}
    long_text = "The outer race shows impacts " + "with clear harmonics " * 60
    a["findings"][0]["text"] = long_text
    body = payloads.result(a, agent=AGENT, site=SITE, alert_state="watch")
    raw = payloads.encode(dict(body, seq=2**32 - 1))
    assert len(raw) < 1024  # contract: a result message stays under 1 KiB
    text = body["findings"][0]["text"]
    assert text.endswith("…") and long_text.startswith(text[:-1]) and len(text) > 24
    validate("result", json.loads(raw))


def test_result_refuses_findings_of_a_flagged_capture():
    # Contract: a capture with any quality flag has no findings.
    with pytest.raises(ValueError, match="flagged"):
        payloads.result(analysis(findings=True, quality=["clipped"]), agent=AGENT, site=SITE,
                        alert_state="normal")


@pytest.mark.parametrize("path,value", [(("quality",), ["sticky"]), (("levels", "iso_zone"), "E"),
                                        (("findings", 0, "severity"), "severe"),
                                        (("findings", 0, "modulation"), "gear")])
def test_result_refuses_unknown_vocabulary(path, value):
    a = analysis(findings=True)
    target = a
    for key in path[:-1]:
        target = target[key]
    target[path[-1]] = value
    with pytest.raises(ValueError):
        payloads.result(a, agent=AGENT, site=SITE, alert_state="normal")
    with pytest.raises(ValueError):
        payloads.result(analysis(findings=False), agent=AGENT, site=SITE, alert_state="alarm")


def test_result_schema_is_strict():
    body = payloads.result(analysis(findings=False), agent=AGENT, site=SITE, alert_state="normal")
    good = dict(body, seq=7)
    validate("result", good)
    for broken in (dict(good, extra=1), {k: v for k, v in good.items() if k != "seq"},
                   dict(good, alert="alarm"), dict(good, ts="2026-12-02 07:26:44"),
                   dict(good, defects=dict(good["defects"], cage={"found_hz": None})),
                   dict(good, quality=["clipped"], findings=[{"defect": "bpfo", "severity": "low",
                                                             "modulation": "none"}])):
        with pytest.raises(jsonschema.ValidationError):
            validate("result", broken)


# --------------------------------------------------------------------------- alert
@dataclass
class Reason:
    indicator: str
    value: float
    limit: float
    limit_kind: str
    text: str


def test_alert_from_plain_fields(tmp_path):
    reasons = [Reason("velocity_rms_mm_s", 7.1234, 4.5, "iso_zone",
                      "Velocity 7.12 mm/s is in ISO 20816 zone C (above 4.5 mm/s)."),
               {"indicator": "bpfo", "value": 21.37, "limit": 20.0, "limit_kind": "defect",
                "text": "Outer-race line 21.4 dB above the noise floor."}]
    body = payloads.alert(agent=AGENT, site=SITE, point=POINT, state="act", previous="watch",
                          reasons=reasons, text="Velocity and an outer-race signature rose.",
                          ts=1796196404.5)
    raw, msg = stored(tmp_path, "alert", body)
    validate("alert", msg)
    assert msg["reasons"][0] == {"indicator": "velocity_rms_mm_s", "value": 7.12, "limit": 4.5,
                                 "limit_kind": "iso_zone",
                                 "text": "Velocity 7.12 mm/s is in ISO 20816 zone C (above 4.5 mm/s)."}
    assert msg["reasons"][1]["value"] == 21.4
    assert "lock-out/tag-out" in msg["caution"] and "analyst" in msg["caution"]
    with pytest.raises(ValueError):
        payloads.alert(agent=AGENT, site=SITE, point=POINT, state="alarm", previous="normal",
                       reasons=[], text="")
    with pytest.raises(ValueError):
        payloads.alert(agent=AGENT, site=SITE, point=POINT, state="act", previous="normal",
                       reasons=[dict(reasons[1], limit_kind="guess")], text="")


# --------------------------------------------------------------------------- spectrum
def envelope_spectrum(bpfo_hz=78.6, shaft_hz=24.8, df_hz=0.125, fmax_hz=6400.0):
    """A noise floor with narrow lines at BPFO harmonics and 1x (one bin wide each)."""
    f = np.arange(0.0, fmax_hz, df_hz)
    rng = np.random.default_rng(7)
    a = 1e-6 * (1.0 + rng.random(f.size))
    lines = {}
    for h in range(1, 6):
        i = int(round(h * bpfo_hz / df_hz))
        a[i] = 1e-3 / h
        lines[f[i]] = a[i]
    a[int(round(shaft_hz / df_hz))] = 2e-4
    return f, a, lines


def test_spectrum_keeps_peaks_and_covers_ten_times_bpfi(tmp_path):
    f, a, lines = envelope_spectrum()
    markers = {"bpfo": 78.6, "bpfi": 119.4, "bsf2": 103.4, "ftf": 9.8, "shaft": 24.8}
    body = payloads.spectrum(f, a, agent=AGENT, site=SITE, point=POINT, markers=markers,
                             band_hz=(2000.0, 4000.0), ts=0)
    raw, msg = stored(tmp_path, "spectrum", body)
    validate("spectrum", msg)
    amp = np.array(msg["amplitude"], dtype=float)
    n = amp.size
    assert n <= payloads.SPECTRUM_BINS
    f0, df = msg["f0_hz"], msg["df_hz"]
    assert f0 + n * df >= 10 * markers["bpfi"]   # covers 0 .. 10 x BPFI
    assert f0 + (n - 1) * df < 10 * markers["bpfi"] + df
    # Independent check: each output bin is the maximum of the input bins inside it.
    for i in range(n):
        inside = (f >= f0 + i * df - 1e-9) & (f < f0 + (i + 1) * df - 1e-9)
        assert amp[i] == payloads.round_sig(a[inside].max())
    # Every line keeps its height (an average over the group would divide it).
    for freq, height in lines.items():
        if freq < f0 + n * df:
            assert amp[int((freq - f0) // df)] == payloads.round_sig(height)
    assert msg["unit"] == "(m/s²)²" and msg["band_hz"] == [2000, 4000]
    assert len(raw) < 4096


def test_spectrum_with_explicit_max_and_bad_input():
    f, a, _ = envelope_spectrum()
    body = payloads.spectrum(f, a, agent=AGENT, site=SITE, point=POINT, markers={"shaft": 24.8},
                             band_hz=(500, 1500), max_hz=500.0, bins=100)
    assert len(body["amplitude"]) <= 100
    assert body["f0_hz"] + len(body["amplitude"]) * body["df_hz"] >= 500.0
    assert body["markers"] == {"shaft": 24.8}
    with pytest.raises(ValueError):
        payloads.spectrum(f, a[:-1], agent=AGENT, site=SITE, point=POINT, markers={}, band_hz=(1, 2))
    with pytest.raises(ValueError):
        payloads.spectrum(f, a, agent=AGENT, site=SITE, point=POINT, markers={"gear": 1.0},
                          band_hz=(1, 2))
    with pytest.raises(ValueError):
        payloads.spectrum(f[::-1], a, agent=AGENT, site=SITE, point=POINT, markers={}, band_hz=(1, 2))


# --------------------------------------------------------------------------- status
def test_status_online_and_offline(tmp_path):
    health = {"captures": 12, "flagged": 1, "overruns": 0, "outbox_depth": 3, "outbox_bytes": 2100,
              "dropped": {"result": 2}, "reconnects": 1, "analysis_ms": 41.234, "rss_mb": 61.87,
              "broker": "connected", "source": "ok"}
    for state in payloads.STATUS_STATES:
        body = payloads.status(agent=AGENT, site=SITE, state=state, version="0.1.0",
                               uptime_s=3600.25, health=health)
        _, msg = stored(tmp_path, "status", body, topic=f"{state}/status")
        validate("status", msg)
        assert "point" not in msg
        assert msg["health"]["dropped"] == {"result": 2, "spectrum": 0, "alert": 0}
        assert msg["health"]["analysis_ms"] == 41.2
    with pytest.raises(ValueError):
        payloads.status(agent=AGENT, site=SITE, state="sleeping", version="0.1.0", uptime_s=0,
                        health={})
    with pytest.raises(jsonschema.ValidationError):
        validate("status", dict(copy.deepcopy(msg), health=dict(msg["health"], password="x")))


def test_all_builders_refuse_empty_names():
    with pytest.raises(ValueError):
        payloads.result(analysis(False), agent="", site=SITE, alert_state="normal")
    with pytest.raises(ValueError):
        payloads.status(agent=AGENT, site="", state="online", version="1", uptime_s=0, health={})
    assert math.isclose(payloads.round_sig(math.pi, 6), 3.14159)
