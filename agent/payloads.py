"""Message bodies: the payload dict of each message kind, and its encoding.

Public API
----------
- :func:`result(analysis, *, agent, site, alert_state, ts=None)` -> dict
- :func:`alert(*, agent, site, point, state, previous, reasons, text, caution=CAUTION, ts=None)` -> dict
- :func:`spectrum(freqs_hz, amplitude, *, agent, site, point, markers, band_hz, max_hz=None, bins=SPECTRUM_BINS, ts=None)` -> dict
- :func:`status(*, agent, site, state, version, uptime_s, health, ts=None)` -> dict
- :func:`encode(body)` -> bytes: compact UTF-8 JSON (no NaN, no spaces).
- :func:`round_sig(x, digits=3)`: round to significant figures (None stays None).
- :func:`utc_timestamp(t=None)` -> ``"2026-12-02T07:26:44.123Z"``.
- :func:`load_schema(kind)` -> the JSON Schema (dict) of a kind.
- Vocabularies: ``KINDS``, ``ALERT_STATES``, ``QUALITY_FLAGS``, ``DEFECTS``,
  ``SEVERITIES``, ``MODULATIONS``, ``LIMIT_KINDS``, ``ISO_ZONES``;
  ``RESULT_MAX_BYTES`` (1023: a result message stays under 1 KiB).

The bodies carry every common field except ``seq``: the outbox adds the
per-stream sequence number in the same transaction that stores the message
(:meth:`agent.outbox.Outbox.enqueue`).  Each builder takes plain values
(numbers, strings, dicts, arrays) so it can be used without the pipeline.

Notes
-----
Numbers are rounded to 3 significant figures: more digits than the
measurement supports only cost bytes.  A rounded value that is a whole number
is written as an integer (``120`` rather than ``120.0``).  Non-finite numbers
become ``null``.

A result message (with the ``seq`` the outbox adds) stays below 1 KiB, so it
fits brokers and links with small message limits.  With all four defects found
and four findings the full body is about 1.2 KiB, so when it is too large
:func:`result` marks it ``"trimmed": true`` and leaves out, in this order and
only as far as needed: all but ``expected_hz`` and ``found_hz`` of defects
that were not found, the tail of each finding's text (cut at a word boundary,
ending in "…"), the texts (the alert message carries the full explanation),
``modulation_hz`` of each defect (it follows from the finding's modulation and
``shaft_hz``), ``expected_hz`` of found defects (the spectrum markers carry
it), and ``levels.velocity_band_hz`` (fixed by the config).
"""

from __future__ import annotations

import json
import math
import time
from datetime import datetime, timezone
from importlib import resources

import numpy as np

from agent.safety import CAUTION

__all__ = [
    "result", "alert", "spectrum", "status", "encode", "round_sig", "utc_timestamp",
    "load_schema", "schema_id", "KINDS", "ALERT_STATES", "QUALITY_FLAGS", "DEFECTS",
    "SEVERITIES", "MODULATIONS", "LIMIT_KINDS", "ISO_ZONES", "RESULT_MAX_BYTES",
    "SPECTRUM_BINS", "SPECTRUM_UNIT", "CAUTION", "STATUS_STATES",
]

SCHEMA_VERSION = 1
KINDS = ("status", "result", "alert", "spectrum")
ALERT_STATES = ("normal", "watch", "act")
STATUS_STATES = ("online", "offline")
QUALITY_FLAGS = ("clipped", "flat", "dc_offset", "overrun", "wrong_rate", "too_short", "nonfinite")
DEFECTS = ("bpfo", "bpfi", "bsf", "ftf")
SEVERITIES = ("low", "medium", "high")
MODULATIONS = ("none", "shaft", "cage")
LIMIT_KINDS = ("iso_zone", "absolute", "baseline", "defect")
ISO_ZONES = ("A", "B", "C", "D")
RESULT_MAX_BYTES = 1023
SPECTRUM_BINS = 300
SPECTRUM_UNIT = "(m/s²)²"
SIG_DIGITS = 3

_LEVEL_KEYS = ("accel_rms_m_s2", "accel_peak_m_s2", "crest_factor", "kurtosis",
               "velocity_rms_mm_s")
_DEFECT_KEYS = ("expected_hz", "found_hz", "amplitude", "snr_db", "harmonics",
                "sideband_ratio", "modulation_hz")
_MARKER_KEYS = ("bpfo", "bpfi", "bsf2", "ftf", "shaft")
_HEALTH_COUNTS = ("captures", "flagged", "overruns", "outbox_depth", "outbox_bytes",
                  "reconnects")
_ELLIPSIS = "…"
_SEQ_RESERVE = len(',"seq":4294967295')  # added by the outbox
_MIN_TEXT_BYTES = 24


# --------------------------------------------------------------------------- helpers
def schema_id(kind):
    """``"ballpass.<kind>/1"``, the ``schema`` field of a message of ``kind``."""
    if kind not in KINDS:
        raise ValueError(f"kind={kind!r} must be one of {KINDS!r}")
    return f"ballpass.{kind}/{SCHEMA_VERSION}"


def utc_timestamp(t=None):
    """UTC time as ISO 8601 with milliseconds and ``Z``.

    Parameters
    ----------
    t : float, optional
        Seconds since the Unix epoch; default now (``time.time()``).

    Returns
    -------
    str
        E.g. ``"2026-12-02T07:26:44.123Z"`` (time rounded to microseconds,
        then truncated to milliseconds, as ``datetime.isoformat`` does).
    """
    if t is None:
        t = time.time()
    if not isinstance(t, (int, float)) or isinstance(t, bool) or not math.isfinite(t):
        raise ValueError(f"{t=} must be a finite number of seconds since the epoch")
    dt = datetime.fromtimestamp(t, tz=timezone.utc)  # rounded to whole microseconds
    return f"{dt.strftime('%Y-%m-%dT%H:%M:%S')}.{dt.microsecond // 1000:03d}Z"


def round_sig(x, digits=SIG_DIGITS):
    """Round ``x`` to ``digits`` significant figures.

    Parameters
    ----------
    x : float, int or None
        The value; None and non-finite values give None.
    digits : int, optional
        Significant figures (default 3).

    Returns
    -------
    int, float or None
        An int when the rounded value is a whole number below 1e15, so that
        the JSON text carries no ``.0``.
    """
    if x is None:
        return None
    if not isinstance(digits, int) or digits < 1:
        raise ValueError(f"{digits=} must be a whole number >= 1")
    x = float(x)
    if not math.isfinite(x):
        return None
    r = float(f"{x:.{digits}g}")
    if r.is_integer() and abs(r) < 1e15:
        return int(r)
    return r


def encode(body):
    """Encode a message body as compact UTF-8 JSON.

    Raises
    ------
    ValueError
        When the body holds NaN or infinity (not valid JSON) or a value that
        JSON cannot represent.
    """
    try:
        return json.dumps(body, separators=(",", ":"), ensure_ascii=False,
                          allow_nan=False).encode("utf-8")
    except TypeError as exc:
        raise ValueError(f"message body cannot be encoded as JSON: {exc}") from None


def load_schema(kind):
    """The JSON Schema (draft 2020-12) of message ``kind`` as a dict."""
    if kind not in KINDS:
        raise ValueError(f"kind={kind!r} must be one of {KINDS!r}")
    folder = resources.files("agent").joinpath("schemas")
    text = folder.joinpath(f"{kind}.json").read_text(encoding="utf-8")
    return json.loads(text)


def _common(kind, agent, site, point, ts):
    for name, value in (("agent", agent), ("site", site)):
        if not isinstance(value, str) or not value:
            raise ValueError(f"{name}={value!r} must be a non-empty string")
    body = {"schema": schema_id(kind), "agent": agent, "site": site}
    if point is not None:
        if not isinstance(point, str) or not point:
            raise ValueError(f"{point=} must be a non-empty string")
        body["point"] = point
    body["ts"] = utc_timestamp(ts)
    return body


def _get(obj, name, default=None):
    """A field of a mapping or an attribute of an object."""
    if isinstance(obj, dict):
        return obj.get(name, default)
    return getattr(obj, name, default)


def _choice(name, value, choices):
    if value not in choices:
        raise ValueError(f"{name}={value!r} must be one of {choices!r}")
    return value


# --------------------------------------------------------------------------- result
def result(analysis, *, agent, site, alert_state, ts=None):
    """The body of a result message.

    Parameters
    ----------
    analysis : dict
        ``Analysis.to_dict()`` of the pipeline (point, levels, shaft_hz,
        quality, defects, findings; see the shared contract).
    agent, site : str
        Who measured.
    alert_state : str
        Current alert state of the point, one of ``ALERT_STATES``.
    ts : float, optional
        Capture time, seconds since the epoch; default now.

    Returns
    -------
    dict
        Common fields (without ``seq``), ``alert``, ``levels``, ``shaft_hz``,
        ``quality``, ``defects``, ``findings``; numbers to 3 significant
        figures.  Its encoding is at most ``RESULT_MAX_BYTES`` bytes for any
        realistic analysis (see the module notes for what is trimmed).

    Raises
    ------
    ValueError
        For an unknown alert state, quality flag, defect, severity or
        modulation, or a body that cannot be brought under the size limit
        (names of many hundred characters).
    """
    if not isinstance(analysis, dict):
        raise ValueError(f"analysis must be the dict of Analysis.to_dict(), not {type(analysis).__name__}")
    _choice("alert_state", alert_state, ALERT_STATES)
    if not analysis.get("point"):
        raise ValueError("analysis['point'] must name the measuring point")
    body = _common("result", agent, site, analysis["point"], ts)
    body["alert"] = alert_state
    body["levels"] = _levels(analysis.get("levels") or {})
    body["shaft_hz"] = round_sig(analysis.get("shaft_hz"))
    body["quality"] = [_choice("quality flag", q, QUALITY_FLAGS) for q in analysis.get("quality") or ()]
    defects = analysis.get("defects") or {}
    body["defects"] = {k: _defect(defects[k]) for k in DEFECTS if k in defects}
    unknown = sorted(set(defects) - set(DEFECTS))
    if unknown:
        raise ValueError(f"analysis defects {unknown!r} must be among {DEFECTS!r}")
    body["findings"] = [_finding(f) for f in analysis.get("findings") or ()]
    if body["quality"] and body["findings"]:
        raise ValueError(f"analysis has quality flags {body['quality']!r} and findings: a flagged "
                         f"capture must have no findings")
    return _fit(body)


def _levels(levels):
    out = {k: round_sig(levels.get(k)) for k in _LEVEL_KEYS}
    band = levels.get("velocity_band_hz")
    out["velocity_band_hz"] = None if band is None else [round_sig(b) for b in band]
    zone = levels.get("iso_zone")
    out["iso_zone"] = None if zone is None else _choice("iso_zone", zone, ISO_ZONES)
    return out


def _defect(d):
    out = {}
    for k in _DEFECT_KEYS:
        v = d.get(k)
        if k == "harmonics":
            out[k] = 0 if v is None else int(v)
        else:
            out[k] = round_sig(v)
    return out


def _finding(f):
    text = f.get("text") or ""
    if not isinstance(text, str):
        raise ValueError(f"finding text={text!r} must be a string")
    return {"defect": _choice("finding defect", f.get("defect"), DEFECTS),
            "severity": _choice("finding severity", f.get("severity"), SEVERITIES),
            "modulation": _choice("finding modulation", f.get("modulation"), MODULATIONS),
            "text": text}


def _size(body):
    return len(encode(body)) + _SEQ_RESERVE


def _without(d, key):
    return {k: v for k, v in d.items() if k != key}


def _drop_texts(body):
    return dict(body, findings=[_without(f, "text") for f in body["findings"]])


def _drop_modulation_hz(body):
    return dict(body, defects={k: _without(d, "modulation_hz") for k, d in body["defects"].items()})


def _reduce_not_found(body):
    return dict(body, defects={k: (d if d.get("found_hz") is not None
                                   else {"expected_hz": d.get("expected_hz"), "found_hz": None})
                               for k, d in body["defects"].items()})


def _drop_expected_of_found(body):
    return dict(body, defects={k: (_without(d, "expected_hz") if d.get("found_hz") is not None else d)
                               for k, d in body["defects"].items()})


def _drop_velocity_band(body):
    return dict(body, levels=_without(body["levels"], "velocity_band_hz"))


# Least valuable first: a defect that was not found needs only where it was
# looked for; the texts are repeated in the alert message (they are first
# shortened, then dropped); modulation_hz follows from the finding's
# modulation and shaft_hz; the expected frequency of a found defect is in the
# spectrum markers; the velocity band is fixed by the config.
_TRIMS = (_reduce_not_found, _drop_texts, _drop_modulation_hz, _drop_expected_of_found,
          _drop_velocity_band)


def _shorten_texts(body):
    """The body with the findings' texts cut to share the spare bytes, or None."""
    findings = body["findings"]
    if not findings or not any("text" in f for f in findings):
        return None
    spare = RESULT_MAX_BYTES - _size(_drop_texts(body))
    share = spare // len(findings) - len(',"text":')
    if share < _MIN_TEXT_BYTES:
        return None
    return dict(body, findings=[dict(f, text=_shorten(f["text"], share)) for f in findings])


def _fit(body):
    """Trim a result body in steps until its message is at most RESULT_MAX_BYTES."""
    if _size(body) <= RESULT_MAX_BYTES:
        return body
    body = dict(body, trimmed=True)
    for trim in _TRIMS:
        body = trim(body)
        if _size(body) <= RESULT_MAX_BYTES:
            return body
        shortened = _shorten_texts(body)
        if shortened is not None and _size(shortened) <= RESULT_MAX_BYTES:
            return shortened
    raise ValueError(f"result message of {_size(body)} bytes cannot be brought under "
                     f"{RESULT_MAX_BYTES + 1} bytes; shorten the agent, site or point name")


def _shorten(text, max_bytes):
    """``text`` cut at a word boundary to at most ``max_bytes`` encoded bytes."""
    if len(encode(text)) <= max_bytes:
        return text
    budget = max_bytes - len(_ELLIPSIS.encode("utf-8")) - 2  # 2: the quotes
    if budget <= 0:
        return ""
    cut = text.encode("utf-8")[:budget].decode("utf-8", errors="ignore")
    if " " in cut:
        cut = cut[:cut.rindex(" ")]
    return cut.rstrip(" ,;:.") + _ELLIPSIS


# --------------------------------------------------------------------------- alert
def alert(*, agent, site, point, state, previous, reasons, text, caution=CAUTION, ts=None):
    """The body of an alert message (an alert state change of one point).

    Parameters
    ----------
    agent, site, point : str
        Who and what.
    state, previous : str
        New and previous state, each one of ``ALERT_STATES``.
    reasons : sequence of mapping or objects
        Each with ``indicator`` (str), ``value`` (float), ``limit`` (float),
        ``limit_kind`` (one of ``LIMIT_KINDS``) and ``text`` (str), as keys or
        attributes.
    text : str
        The plain-words explanation: what, how much, against which limit,
        defect and modulation evidence.
    caution : str, optional
        The safety note; default ``CAUTION``.
    ts : float, optional
        Time of the change, seconds since the epoch; default now.

    Returns
    -------
    dict
        Common fields (without ``seq``), ``state``, ``previous``, ``reasons``,
        ``text``, ``caution``.
    """
    _choice("state", state, ALERT_STATES)
    _choice("previous", previous, ALERT_STATES)
    if not isinstance(text, str):
        raise ValueError(f"{text=} must be a string")
    body = _common("alert", agent, site, point, ts)
    body["state"] = state
    body["previous"] = previous
    out = []
    for r in reasons:
        indicator = _get(r, "indicator")
        if not isinstance(indicator, str) or not indicator:
            raise ValueError(f"reason indicator={indicator!r} must be a non-empty string")
        out.append({"indicator": indicator,
                    "value": round_sig(_get(r, "value")),
                    "limit": round_sig(_get(r, "limit")),
                    "limit_kind": _choice("reason limit_kind", _get(r, "limit_kind"), LIMIT_KINDS),
                    "text": str(_get(r, "text") or "")})
    body["reasons"] = out
    body["text"] = text
    body["caution"] = caution
    return body


# --------------------------------------------------------------------------- spectrum
def spectrum(freqs_hz, amplitude, *, agent, site, point, markers, band_hz, max_hz=None,
             bins=SPECTRUM_BINS, ts=None):
    """The body of an envelope-spectrum snapshot, decimated to ``bins`` numbers.

    Parameters
    ----------
    freqs_hz : array_like, shape (n,)
        Evenly spaced frequencies of the envelope spectrum, ascending.
    amplitude : array_like, shape (n,)
        Envelope spectrum in (m/s²)².
    agent, site, point : str
        Who and what.
    markers : mapping
        Frequencies to mark, keys among ``bpfo``, ``bpfi``, ``bsf2``, ``ftf``,
        ``shaft`` (Hz; None leaves a marker out).
    band_hz : (float, float)
        The demodulated band of the envelope analysis.
    max_hz : float, optional
        Highest frequency to cover.  Default: 10 x the BPFI marker (the tenth
        harmonic of the fastest race defect), else the whole spectrum.
    bins : int, optional
        Number of output bins (default 300).
    ts : float, optional
        Capture time, seconds since the epoch; default now.

    Returns
    -------
    dict
        Common fields (without ``seq``), ``f0_hz``, ``df_hz``, ``unit``,
        ``amplitude`` (list of ``bins`` or fewer numbers), ``markers``,
        ``band_hz``.  Output bin ``i`` covers ``f0_hz + i*df_hz`` up to the next.

    Notes
    -----
    Each output bin holds the **maximum** of the input bins it covers, so a
    narrow defect line keeps its height whatever the decimation factor (an
    average would divide it by the factor).  The factor is a whole number, so
    ``df_hz`` is a multiple of the input resolution.
    """
    f = np.asarray(freqs_hz, dtype=float)
    a = np.asarray(amplitude, dtype=float)
    if f.ndim != 1 or a.shape != f.shape or f.size < 2:
        raise ValueError(f"freqs_hz and amplitude must be 1-D of the same length >= 2, "
                         f"got shapes {f.shape} and {a.shape}")
    if not isinstance(bins, int) or bins < 8:
        raise ValueError(f"{bins=} must be a whole number >= 8")
    df_in = float(f[1] - f[0])
    if not df_in > 0 or not math.isfinite(df_in):
        raise ValueError(f"freqs_hz must be ascending and evenly spaced, got step {df_in!r}")
    raw_marks = {_choice("marker", k, _MARKER_KEYS): float(v)
                 for k, v in dict(markers).items() if v is not None}
    marks = {k: round_sig(v) for k, v in raw_marks.items()}
    if max_hz is None:
        max_hz = 10.0 * raw_marks["bpfi"] if raw_marks.get("bpfi") else float(f[-1])
    if not max_hz > f[0]:
        raise ValueError(f"{max_hz=} must be above the first frequency {f[0]!r}")
    n_in = int(min(f.size, math.floor((max_hz - f[0]) / df_in) + 1))
    factor = max(1, math.ceil(n_in / bins))
    n_out = math.ceil(n_in / factor)
    padded = np.full(n_out * factor, -np.inf)
    padded[:n_in] = np.where(np.isfinite(a[:n_in]), a[:n_in], -np.inf)
    peaks = padded.reshape(n_out, factor).max(axis=1)
    body = _common("spectrum", agent, site, point, ts)
    body["f0_hz"] = round_sig(f[0])
    body["df_hz"] = float(df_in * factor)
    body["unit"] = SPECTRUM_UNIT
    body["amplitude"] = [round_sig(v) for v in peaks]
    body["markers"] = marks
    lo, hi = band_hz
    body["band_hz"] = [round_sig(lo), round_sig(hi)]
    return body


# --------------------------------------------------------------------------- status
def status(*, agent, site, state, version, uptime_s, health, ts=None):
    """The body of a status message (retained; also the last will).

    Parameters
    ----------
    agent, site : str
        Who.
    state : str
        ``"online"`` or ``"offline"``.
    version : str
        Package version.
    uptime_s : float
        Seconds since the daemon started.
    health : mapping
        ``captures``, ``flagged``, ``overruns``, ``outbox_depth``,
        ``outbox_bytes``, ``reconnects`` (counts), ``dropped`` (counts per
        kind: result, spectrum, alert), ``analysis_ms``, ``rss_mb`` (numbers
        or None), ``broker`` and ``source`` (``"ok"``/``"connected"`` or an
        error text).  Missing counts are 0.

    Returns
    -------
    dict
        Common fields (without ``seq`` and ``point``), ``state``, ``version``,
        ``uptime_s``, ``health``.
    """
    _choice("state", state, STATUS_STATES)
    body = _common("status", agent, site, None, ts)
    body["state"] = state
    body["version"] = str(version)
    body["uptime_s"] = round_sig(max(0.0, float(uptime_s)), 6)
    h = {k: int(health.get(k) or 0) for k in _HEALTH_COUNTS}
    dropped = health.get("dropped") or {}
    h["dropped"] = {k: int(dropped.get(k) or 0) for k in ("result", "spectrum", "alert")}
    h["analysis_ms"] = round_sig(health.get("analysis_ms"))
    h["rss_mb"] = round_sig(health.get("rss_mb"))
    h["broker"] = str(health.get("broker") or "unknown")
    h["source"] = str(health.get("source") or "unknown")
    body["health"] = h
    return body
