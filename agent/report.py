"""Text reports for the terminal: aligned tables, units everywhere.

- :func:`table`: align rows of strings under headers.
- :func:`analysis_report`: the readable form of an :class:`~agent.pipeline.Analysis`.
- :func:`bearing_report`: the defect frequencies of a bearing.
- :data:`CAUTION`: the caution printed under every diagnosis.
"""

from __future__ import annotations

import textwrap

from agent.findings import DEFECTS, HARMONIC_SNR_DB, same_line_words
from agent.safety import CAUTION

__all__ = ["CAUTION", "table", "analysis_report", "bearing_report"]


_FLAG_WORDS = {
    "nonfinite": "invalid samples (NaN, infinity or beyond 10^6 m/s²)",
    "clipped": "clipped at the input's full scale: lower the gain or use a less sensitive sensor",
    "flat": "no signal: sensor disconnected, unpowered or broken",
    "dc_offset": "large DC offset: check the sensor bias supply and cable",
    "too_short": "capture shorter than one analysis segment",
    "overrun": "samples were lost (input overrun)",
    "wrong_rate": "the input ran at another sample rate than configured",
}


def table(headers, rows, align=None):
    """Rows of strings aligned under headers (``align``: "<" or ">" per column)."""
    cols = len(headers)
    align = align or ["<"] + [">"] * (cols - 1)
    widths = [max(len(str(r[i])) for r in [headers, *rows]) for i in range(cols)]
    lines = []
    for r in [headers, *rows]:
        cells = [f"{str(c):{a}{w}}" for c, a, w in zip(r, align, widths)]
        lines.append("  ".join(cells).rstrip())
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def _num(v, fmt, unit=""):
    if v is None:
        return "-"
    return f"{v:{fmt}}{(' ' + unit) if unit else ''}"


def analysis_report(d, source=""):
    """Readable report of an analysis dict (``Analysis.to_dict()``)."""
    lv = d["levels"]
    env = d["envelope"]
    out = []
    head = f"ballpass analysis of point {d['point']}"
    if source:
        head += f"  ({source}, {d['capture_s']:.1f} s at {d['sample_rate_hz']:.0f} Hz)"
    out += [head, ""]
    if lv["velocity_rms_mm_s"] is not None:
        band = lv["velocity_band_hz"]
        vel = (f"{lv['velocity_rms_mm_s']:.2f} mm/s RMS ({band[0]:g}-{band[1]:g} Hz), ISO 20816-3 "
               f"zone {lv['iso_zone']} (group {lv['iso_group']}, {lv['support']} support)")
    else:
        vel = "-"
    speed = (f"{d['shaft_hz']:.2f} Hz = {d['shaft_hz'] * 60:.0f} r/min "
             f"({'measured from the 1x line' if d['speed_source'] == 'spectrum' else 'nominal, no clear 1x line'}"
             f"; nominal {d['shaft_hz_nominal']:.2f} Hz)")
    if env["band_hz"]:
        how = ("chosen by spectral kurtosis" + (f", SK {env['band_kurtosis']:.1f}"
                                                if env.get("band_kurtosis") is not None else "")
               if env["band_source"] == "auto" else "from the configuration")
        band = f"{env['band_hz'][0]:.0f}-{env['band_hz'][1]:.0f} Hz ({how}); resolution {env['resolution_hz']:.2f} Hz"
    else:
        band = "-"
    quality = "good" if not d["quality"] else "; ".join(_FLAG_WORDS.get(f, f) for f in d["quality"])
    rows = [
        ("acceleration RMS", _num(lv["accel_rms_m_s2"], ".3g", "m/s²")),
        ("acceleration peak", _num(lv["accel_peak_m_s2"], ".3g", "m/s²")),
        ("crest factor", _num(lv["crest_factor"], ".2f")),
        ("kurtosis", _num(lv["kurtosis"], ".2f") + "  (3 for random noise)"),
        ("velocity", vel),
        ("shaft speed", speed),
        ("envelope band", band),
        ("signal quality", quality),
    ]
    w = max(len(r[0]) for r in rows)
    out += ["Levels"] + [f"  {k:<{w}}  {v}" for k, v in rows] + [""]

    if d["defects"]:
        rows = []
        for key, ev in d["defects"].items():
            label = DEFECTS[key][0]
            sb = "-"
            if ev.get("sideband_ratio") is not None:
                at = "1x" if key in ("bpfo", "bpfi") else "FTF"
                sb = f"{ev['sideband_ratio']:.2f} at ±{at}"
            rows.append((label, f"{ev['expected_hz']:.2f}",
                         _num(ev["found_hz"], ".2f"), f"{ev['amplitude']:.3g}",
                         f"{ev['snr_db']:.1f}", f"{ev['harmonics']} of {ev['searched']}", sb))
        out += ["Defect frequencies in the envelope spectrum (amplitude in (m/s²)²; "
                "2xBSF is the rolling-element defect rate)"]
        out += ["  " + line for line in table(
            ("defect", "expected Hz", "found Hz", "amplitude", "SNR dB", "harmonics", "sideband ratio"),
            rows).splitlines()]
        out.append(f"  sideband ratio = (lower + upper sideband) / line, shown where the line stands "
                   f"{HARMONIC_SNR_DB:g} dB above the floor")
        out.append("  (2 x the other sideband / line where one sideband is another defect's line)")
        for key, ev in d["defects"].items():
            if ev.get("same_line_as"):
                out.append(f"  {same_line_words(key, ev['same_line_as'], ev.get('same_line_harmonic'))}"
                           f"; it is not judged on its own")
        out.append("")

    out.append("Findings")
    if d["quality"]:
        out.append("  none: the capture failed the signal-quality check, so no bearing judgement is made.")
    elif not d["findings"]:
        out.append("  no bearing defect signature.")
    for f in d["findings"]:
        out.append(f"  * {f['text']}")
    if d.get("summary"):
        out.append(f"  {d['summary']}")
    out += ["", textwrap.fill(CAUTION, 88)]
    return "\n".join(out)


def bearing_report(geometry, orders, freqs_hz=None):
    """Defect orders (and frequencies) of a bearing as a table."""
    head = "Bearing"
    if geometry:
        head += (f": {geometry['balls']} rolling elements, d = {geometry['ball_diameter_mm']:g} mm, "
                 f"D = {geometry['pitch_diameter_mm']:g} mm, contact angle "
                 f"{geometry['contact_angle_deg']:g}°")
    rows = [
        ("BPFO", "outer-race defect", orders.bpfo),
        ("BPFI", "inner-race defect", orders.bpfi),
        ("BSF", "ball spin", orders.bsf),
        ("2xBSF", "rolling-element defect", 2 * orders.bsf),
        ("FTF", "cage", orders.ftf),
    ]
    headers = ["line", "meaning", "orders (x shaft)"]
    body = [[a, b, f"{c:.4f}"] for a, b, c in rows]
    if freqs_hz is not None:
        headers.append("Hz")
        for r, (_, _, c) in zip(body, rows):
            r.append(f"{c * freqs_hz:.2f}")
    return head + "\n\n" + table(headers, body, ["<", "<", ">", ">"][:len(headers)])
