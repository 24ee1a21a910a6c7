"""State and rendering of the terminal dashboard (``tools/dashboard``).

Public API
----------
- :class:`DashboardModel(prefix)` -- what the dashboard knows, fed one MQTT
  message at a time: :meth:`~DashboardModel.handle` (topic, payload bytes,
  retained flag) -> event dict; :meth:`~DashboardModel.snapshot` -> a
  JSON-ready dict; :meth:`~DashboardModel.spectrum` -> latest spectrum body.
- :func:`parse_payload(kind, parts, payload)` -> dict, or :class:`PayloadError`.
- :func:`render_table(snapshot, width=..., color=False)` -> str: agents,
  points and the alert log.
- :func:`render_spectrum(spectrum, width=72, height=12, bar="#")` -> str: a
  text plot of an envelope spectrum with defect-frequency markers.
- :func:`render_event(event)` -> str: one line per message, for output that
  is not a terminal.
- :func:`sanitize(text, max_len=...)` -> str: payload text made safe to print.
- ``SNAPSHOT_SCHEMA`` = ``"ballpass.dashboard/1"``.

Payloads are untrusted input.  They are decoded as strict UTF-8 JSON (no NaN
or Infinity, no repeated keys, size-limited), must carry the schema of their
topic's kind and name the same site, agent and point as the topic; anything
else is counted as malformed and shown, never acted on.  Every string taken
from a payload has its control characters removed before it is printed, so a
payload cannot move the cursor or recolour the terminal.

Sequence numbers: each stream (status per agent; result, alert, spectrum per
point) carries ``seq``.  A number more than one above the last one seen
counts the missing ones as a gap; a number at or below the last one seen
counts as a duplicate and the message is not applied.  The first message of
a stream only sets the starting point.  Two cases are not counted: a
retained copy the broker replays (re-subscribing after a reconnect), and an
``offline`` status, which is the last will the broker sends for an agent
whose connection died, prepared before the agent's later messages.

Memory is bounded: at most ``MAX_POINTS`` points and agents are tracked
(further ones are counted as ignored), the alert log and the list of
malformed messages are fixed-length.
"""

from __future__ import annotations

import json
import math
import re
from collections import deque
from datetime import datetime, timezone

from agent.topics import parse as parse_topic

__all__ = ["DashboardModel", "PayloadError", "parse_payload", "render_table",
           "render_spectrum", "render_event", "sanitize", "SNAPSHOT_SCHEMA",
           "MAX_PAYLOAD_BYTES", "MAX_POINTS"]

SNAPSHOT_SCHEMA = "ballpass.dashboard/1"
MAX_PAYLOAD_BYTES = 256 * 1024
MAX_POINTS = 2000
MAX_SPECTRUM_BINS = 65536
ALERT_LOG_LENGTH = 50
MALFORMED_KEEP = 10
_STATES = ("normal", "watch", "act")
_ZONES = ("A", "B", "C", "D")
_DEFECTS = ("bpfo", "bpfi", "bsf", "ftf")
_SEVERITY_RANK = {"low": 0, "medium": 1, "high": 2}
_LABELS = {"bpfo": "BPFO", "bpfi": "BPFI", "bsf": "2xBSF", "ftf": "FTF"}
_CONTROL = re.compile(r"[\x00-\x1f\x7f-\x9f\u2028\u2029\u200e\u200f\u202a-\u202e\u2066-\u2069]")


class PayloadError(ValueError):
    """A received payload is not a valid message of its topic."""


# ------------------------------------------------------------------ parsing
def _reject_constant(name):
    raise PayloadError(f"number {name} is not valid JSON")


def _unique_keys(pairs):
    out = {}
    for key, value in pairs:
        if key in out:
            raise PayloadError(f"key {sanitize(key, 40)!r} appears twice")
        out[key] = value
    return out


def _is_num(x):
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def _opt_num(body, key, where=""):
    value = body.get(key)
    if value is not None and not _is_num(value):
        raise PayloadError(f"{where}{key} must be a number or null")
    return value


def _require(cond, message):
    if not cond:
        raise PayloadError(message)


def parse_payload(kind, parts, payload):
    """Decode and check one received message.

    Parameters
    ----------
    kind : {"status", "result", "alert", "spectrum"}
        The kind named by the topic.
    parts : agent.topics.TopicParts
        The topic taken apart (site, agent, point).
    payload : bytes
        The message as received.

    Returns
    -------
    dict
        The decoded body; only the fields the dashboard uses were checked.

    Raises
    ------
    PayloadError
        Naming the first problem found.
    """
    if len(payload) > MAX_PAYLOAD_BYTES:
        raise PayloadError(f"{len(payload)} bytes is more than {MAX_PAYLOAD_BYTES}")
    try:
        text = payload.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise PayloadError(f"not UTF-8 ({exc.reason} at byte {exc.start})") from None
    try:
        body = json.loads(text, parse_constant=_reject_constant, object_pairs_hook=_unique_keys)
    except json.JSONDecodeError as exc:
        raise PayloadError(f"not JSON ({exc.msg} at line {exc.lineno} column {exc.colno})") from None
    except RecursionError:
        raise PayloadError("JSON nested too deeply") from None
    _require(isinstance(body, dict), "not a JSON object")
    schema = f"ballpass.{kind}/1"
    _require(body.get("schema") == schema,
             f"schema {sanitize(str(body.get('schema')), 40)!r} is not {schema!r}")
    _require(body.get("site") == parts.site and body.get("agent") == parts.agent,
             "site/agent differ from the topic")
    if kind != "status":
        _require(body.get("point") == parts.point, "point differs from the topic")
    seq = body.get("seq")
    _require(isinstance(seq, int) and not isinstance(seq, bool) and 0 <= seq < 2 ** 63,
             "seq must be a whole number >= 0")
    ts = body.get("ts")
    _require(isinstance(ts, str) and len(ts) <= 40, "ts must be a timestamp string")
    try:
        datetime.fromisoformat(ts)
    except ValueError:
        raise PayloadError(f"ts {sanitize(ts, 40)!r} is not an ISO 8601 time") from None
    _CHECKS[kind](body)
    return body


def _check_status(body):
    _require(body.get("state") in ("online", "offline"), "state must be online or offline")
    _opt_num(body, "uptime_s")
    _require(body.get("health") is None or isinstance(body["health"], dict),
             "health must be an object")


def _check_result(body):
    levels = body.get("levels")
    _require(isinstance(levels, dict), "levels must be an object")
    for key in ("velocity_rms_mm_s", "accel_rms_m_s2", "crest_factor", "kurtosis"):
        _opt_num(levels, key, "levels.")
    _require(levels.get("iso_zone") in _ZONES + (None,), "levels.iso_zone must be A-D or null")
    _require(body.get("alert") in _STATES + (None,), "alert must be normal, watch or act")
    quality = body.get("quality", [])
    _require(isinstance(quality, list) and all(isinstance(q, str) for q in quality),
             "quality must be a list of flags")
    defects = body.get("defects", {})
    _require(isinstance(defects, dict), "defects must be an object")
    for key, d in defects.items():
        _require(key in _DEFECTS and isinstance(d, dict), "defects must map bpfo/bpfi/bsf/ftf to objects")
        for field in ("expected_hz", "found_hz", "snr_db", "amplitude"):
            _opt_num(d, field, f"defects.{key}.")
    findings = body.get("findings", [])
    _require(isinstance(findings, list), "findings must be a list")
    for f in findings:
        _require(isinstance(f, dict) and f.get("defect") in _DEFECTS
                 and f.get("severity") in _SEVERITY_RANK, "a finding needs defect and severity")


def _check_alert(body):
    _require(body.get("state") in _STATES, "state must be normal, watch or act")
    _require(body.get("previous") in _STATES + (None,), "previous must be normal, watch or act")
    _require(isinstance(body.get("text", ""), str), "text must be a string")
    _require(isinstance(body.get("reasons", []), list), "reasons must be a list")


def _check_spectrum(body):
    _require(_is_num(body.get("f0_hz")) and body["f0_hz"] >= 0, "f0_hz must be a number >= 0")
    _require(_is_num(body.get("df_hz")) and body["df_hz"] > 0, "df_hz must be a number > 0")
    amp = body.get("amplitude")
    _require(isinstance(amp, list) and 2 <= len(amp) <= MAX_SPECTRUM_BINS
             and all(a is None or _is_num(a) for a in amp),
             f"amplitude must be a list of 2 to {MAX_SPECTRUM_BINS} numbers")
    markers = body.get("markers", {})
    _require(isinstance(markers, dict) and all(v is None or _is_num(v) for v in markers.values()),
             "markers must map names to frequencies")


_CHECKS = {"status": _check_status, "result": _check_result, "alert": _check_alert,
           "spectrum": _check_spectrum}


def sanitize(text, max_len=200):
    """Make text from a payload safe to print on a terminal.

    Parameters
    ----------
    text : object
        Converted with ``str``.
    max_len : int, optional
        Longer text is cut and ends with ``…``.

    Returns
    -------
    str
        Without control characters (C0, C1, bidirectional overrides), which
        could otherwise move the cursor, clear the screen or reorder text.
    """
    s = _CONTROL.sub("", str(text))
    return s if len(s) <= max_len else s[:max_len - 1] + "…"


# -------------------------------------------------------------------- model
class DashboardModel:
    """Everything the dashboard has learnt from the broker.

    Parameters
    ----------
    prefix : str
        The topic prefix (``broker.topic_prefix``); other topics are ignored.
    """

    def __init__(self, prefix):
        self.prefix = prefix
        self.agents = {}        # (site, agent) -> dict
        self.points = {}        # (site, agent, point) -> dict
        self.spectra = {}       # (site, agent, point) -> spectrum body
        self.streams = {}       # (site, agent, point or "", kind) -> counters
        self.alerts = deque(maxlen=ALERT_LOG_LENGTH)
        self.malformed = deque(maxlen=MALFORMED_KEEP)
        self.totals = {"messages": 0, "applied": 0, "malformed": 0, "gaps": 0,
                       "duplicates": 0, "replayed": 0, "foreign": 0, "ignored": 0,
                       "cleared": 0}

    # ------------------------------------------------------------- input
    def handle(self, topic, payload, retained=False):
        """Take in one received message.

        Parameters
        ----------
        topic : str
        payload : bytes
        retained : bool, optional
            The broker's retain flag (a stored copy sent on subscribing).

        Returns
        -------
        dict
            The event: ``outcome`` (``"applied"``, ``"duplicate"``,
            ``"replayed"``, ``"malformed"``, ``"foreign"``, ``"cleared"``,
            ``"ignored"``), ``topic``, ``kind``, ``site``, ``agent``,
            ``point``, ``seq``, ``gap`` (messages missing just before this
            one), ``error`` (for malformed) and ``body`` (when applied).
        """
        self.totals["messages"] += 1
        event = {"topic": sanitize(topic, 300), "kind": None, "site": None, "agent": None,
                 "point": None, "seq": None, "gap": 0, "retained": bool(retained),
                 "outcome": "foreign", "error": None, "body": None}
        parts = parse_topic(self.prefix, topic)
        if parts is None:
            self.totals["foreign"] += 1
            return event
        event.update(kind=parts.kind, site=parts.site, agent=parts.agent, point=parts.point)
        if not payload:
            # an empty retained payload deletes the retained message: nothing to show
            self.totals["cleared"] += 1
            event["outcome"] = "cleared"
            return event
        try:
            body = parse_payload(parts.kind, parts, bytes(payload))
        except PayloadError as exc:
            self.totals["malformed"] += 1
            event.update(outcome="malformed", error=str(exc))
            self.malformed.append({"topic": event["topic"], "error": str(exc)})
            return event
        event["seq"] = body["seq"]

        agent_key = (parts.site, parts.agent)
        point_key = (parts.site, parts.agent, parts.point) if parts.point else None
        if (agent_key not in self.agents and len(self.agents) >= MAX_POINTS) or (
                point_key and point_key not in self.points and len(self.points) >= MAX_POINTS):
            self.totals["ignored"] += 1
            event["outcome"] = "ignored"
            return event

        outcome, gap = self._sequence(parts, body, retained)
        event.update(outcome=outcome, gap=gap)
        if outcome != "applied":
            return event
        self.totals["applied"] += 1
        event["body"] = body
        self._apply(parts, body, retained, agent_key, point_key)
        return event

    def _sequence(self, parts, body, retained):
        key = (parts.site, parts.agent, parts.point or "", parts.kind)
        st = self.streams.get(key)
        if st is None:
            st = self.streams[key] = {"last_seq": None, "received": 0, "gaps": 0, "duplicates": 0}
        seq = body["seq"]
        last = st["last_seq"]
        will = parts.kind == "status" and body.get("state") == "offline"
        if last is not None and seq <= last:
            if will:
                return "applied", 0
            if retained:
                self.totals["replayed"] += 1
                return "replayed", 0
            st["duplicates"] += 1
            self.totals["duplicates"] += 1
            return "duplicate", 0
        gap = 0 if last is None else seq - last - 1
        st["gaps"] += gap
        self.totals["gaps"] += gap
        st["last_seq"] = seq
        st["received"] += 1
        return "applied", gap

    def _point(self, point_key):
        p = self.points.get(point_key)
        if p is None:
            p = self.points[point_key] = {
                "last_result_ts": None, "velocity_rms_mm_s": None, "iso_zone": None,
                "accel_rms_m_s2": None, "quality": [], "finding": None, "alert": None,
                "alert_ts": None, "spectrum_ts": None}
        return p

    def _apply(self, parts, body, retained, agent_key, point_key):
        agent = self.agents.setdefault(agent_key, {"state": None, "ts": None, "version": None,
                                                   "uptime_s": None, "health": None})
        kind = parts.kind
        if kind == "status":
            health = body.get("health") or {}
            agent.update(state=body["state"], ts=body["ts"],
                         version=sanitize(body.get("version", ""), 40) or None,
                         uptime_s=body.get("uptime_s"),
                         health={k: (health.get(k) if _is_num(health.get(k)) else
                                     sanitize(health.get(k), 80) if isinstance(health.get(k), str)
                                     else None)
                                 for k in ("outbox_depth", "reconnects", "captures", "flagged",
                                           "broker", "source") if k in health})
            return
        p = self._point(point_key)
        if kind == "result":
            levels = body["levels"]
            p.update(last_result_ts=body["ts"], velocity_rms_mm_s=levels.get("velocity_rms_mm_s"),
                     iso_zone=levels.get("iso_zone"), accel_rms_m_s2=levels.get("accel_rms_m_s2"),
                     quality=[sanitize(q, 20) for q in body.get("quality", [])][:8],
                     finding=_strongest(body.get("findings", []), body.get("defects", {})))
            if body.get("alert") is not None:
                p["alert"] = body["alert"]
        elif kind == "alert":
            p.update(alert=body["state"], alert_ts=body["ts"])
            self.alerts.append({"ts": body["ts"], "site": parts.site, "agent": parts.agent,
                                "point": parts.point, "state": body["state"],
                                "previous": body.get("previous"), "retained": bool(retained),
                                "text": sanitize(body.get("text", ""), 600)})
        elif kind == "spectrum":
            p["spectrum_ts"] = body["ts"]
            self.spectra[point_key] = body

    # ------------------------------------------------------------ output
    def spectrum(self, point, site=None, agent=None):
        """The latest spectrum body of a point (the newest if several agents have one).

        Returns
        -------
        dict or None
        """
        found = [(body["ts"], body) for (s, a, p), body in self.spectra.items()
                 if p == point and site in (None, s) and agent in (None, a)]
        return max(found, key=lambda x: x[0])[1] if found else None

    def snapshot(self, now=None):
        """Everything known, as a JSON-ready dict.

        Parameters
        ----------
        now : datetime, optional
            Time of the snapshot (UTC); default now.

        Returns
        -------
        dict
            ``schema``, ``generated``, ``prefix``, ``agents`` (site, agent,
            state, ts, version, uptime_s, health), ``points`` (site, agent,
            point, agent_state, last_result_ts, velocity_rms_mm_s, iso_zone,
            accel_rms_m_s2, quality, finding, alert, alert_ts, spectrum_ts),
            ``alerts`` (newest last), ``streams`` (site, agent, point, kind,
            last_seq, received, gaps, duplicates), ``totals`` and
            ``malformed`` (the latest few: topic, error).
        """
        now = now or datetime.now(timezone.utc)
        agents = [{"site": s, "agent": a, **{k: v for k, v in info.items()}}
                  for (s, a), info in sorted(self.agents.items())]
        points = []
        for (s, a, p), info in sorted(self.points.items()):
            state = self.agents.get((s, a), {}).get("state")
            points.append({"site": s, "agent": a, "point": p, "agent_state": state, **info})
        streams = [{"site": s, "agent": a, "point": p or None, "kind": k, **st}
                   for (s, a, p, k), st in sorted(self.streams.items())]
        return {"schema": SNAPSHOT_SCHEMA,
                "generated": now.strftime("%Y-%m-%dT%H:%M:%S.") + f"{now.microsecond // 1000:03d}Z",
                "prefix": self.prefix, "agents": agents, "points": points,
                "alerts": list(self.alerts), "streams": streams, "totals": dict(self.totals),
                "malformed": list(self.malformed)}


def _strongest(findings, defects):
    """The most severe finding (ties: highest SNR) as a small dict, or None."""
    best = None
    for f in findings:
        d = defects.get(f["defect"]) or {}
        snr = d.get("snr_db") if _is_num(d.get("snr_db")) else None
        rank = (_SEVERITY_RANK[f["severity"]], snr if snr is not None else -math.inf)
        if best is None or rank > best[0]:
            freq = d.get("found_hz") if _is_num(d.get("found_hz")) else d.get("expected_hz")
            harmonics = d.get("harmonics")
            best = (rank, {"defect": f["defect"], "severity": f["severity"],
                           "modulation": sanitize(f.get("modulation", "none"), 10),
                           "hz": freq if _is_num(freq) else None, "snr_db": snr,
                           "harmonics": harmonics if isinstance(harmonics, int)
                           and not isinstance(harmonics, bool) else None})
    return None if best is None else best[1]


# ---------------------------------------------------------------- rendering
_ANSI = {"red": "\x1b[31m", "yellow": "\x1b[33m", "green": "\x1b[32m", "bold": "\x1b[1m",
         "dim": "\x1b[2m", "reset": "\x1b[0m"}
_STATE_COLOR = {"act": "red", "watch": "yellow", "normal": "green", "offline": "red",
                "online": "green", "C": "yellow", "D": "red"}


def _paint(text, color_key, color):
    if not color or color_key not in _STATE_COLOR and color_key not in _ANSI:
        return text
    code = _ANSI[_STATE_COLOR.get(color_key, color_key)]
    return f"{code}{text}{_ANSI['reset']}"


def _short_ts(ts):
    """``2026-05-09T07:35:25.123Z`` -> ``05-09 07:35:25Z`` (payload text, sanitized)."""
    if not ts:
        return "-"
    try:
        t = datetime.fromisoformat(ts)
    except (TypeError, ValueError):
        return sanitize(ts, 20)
    if t.tzinfo is not None:
        t = t.astimezone(timezone.utc)
    return t.strftime("%m-%d %H:%M:%SZ")


def _fmt(x, digits=3):
    return "-" if x is None else f"{x:.{digits}g}"


def _finding_words(f):
    if not f:
        return "none"
    parts = [_LABELS.get(f["defect"], "?")]
    if f.get("hz") is not None:
        parts.append(f"{f['hz']:.4g} Hz")
    if f.get("snr_db") is not None:
        parts.append(f"{f['snr_db']:.0f} dB")
    parts.append(f["severity"])
    if f.get("modulation") not in (None, "none"):
        parts.append(f"sb {f['modulation']}")
    return " ".join(parts)


def _cell(text, width, color_key=None, color=False):
    text = sanitize(text, 10_000)
    if len(text) > width:
        text = text[:max(0, width - 1)] + "…"
    return _paint(text.ljust(width), color_key, color) if color_key else text.ljust(width)


def render_table(snapshot, width=120, color=False, alert_lines=8):
    """The dashboard screen: header, agents and points, alert log.

    Parameters
    ----------
    snapshot : dict
        :meth:`DashboardModel.snapshot`.
    width : int, optional
        Terminal width in characters; long cells are cut.
    color : bool, optional
        Colour states with ANSI escapes (terminals only).
    alert_lines : int, optional
        How many of the latest alerts to show.

    Returns
    -------
    str
        Lines separated by ``\\n``, no trailing newline.
    """
    if width < 40:
        raise ValueError(f"{width=} must be at least 40 characters")
    t = snapshot["totals"]
    lines = [_paint(f"ballpass dashboard  prefix {sanitize(snapshot['prefix'], 40)}  "
                    f"{t['messages']} messages  {t['malformed']} malformed  {t['gaps']} missing  "
                    f"{t['duplicates']} duplicates  at {_short_ts(snapshot['generated'])}",
                    "bold", color)]
    points_by_agent = {}
    for p in snapshot["points"]:
        points_by_agent.setdefault((p["site"], p["agent"]), []).append(p)
    agent_keys = sorted({(a["site"], a["agent"]) for a in snapshot["agents"]} | set(points_by_agent))
    agent_info = {(a["site"], a["agent"]): a for a in snapshot["agents"]}
    agent_w = min(40, max([10] + [len(sanitize(f"{s}/{a}", 100)) for s, a in agent_keys]))
    point_w = min(32, max([5] + [len(sanitize(p["point"], 100)) for p in snapshot["points"]]))
    fixed = [("SITE/AGENT", agent_w), ("STATUS", 7), ("POINT", point_w), ("LAST RESULT", 15),
             ("VELOCITY", 11), ("ZONE", 4), ("ALERT", 6)]
    finding_w = max(10, width - sum(w + 1 for _, w in fixed))
    lines.append(" ".join(name.ljust(w) for name, w in fixed) + " STRONGEST FINDING")
    shown_agents = set()
    for key in agent_keys:
        state = (agent_info.get(key) or {}).get("state") or "?"
        rows = points_by_agent.get(key) or [None]
        for p in rows:
            first = key not in shown_agents
            shown_agents.add(key)
            cells = [_cell(f"{key[0]}/{key[1]}" if first else "", agent_w),
                     _cell(state if first else "", 7, state if first else None, color)]
            if p is None:
                cells.append("(no point messages yet)")
            else:
                zone = p.get("iso_zone") or "-"
                velocity = p.get("velocity_rms_mm_s")
                alert = p.get("alert") or "-"
                quality = ",".join(p.get("quality") or [])
                cells += [_cell(p["point"], point_w), _cell(_short_ts(p.get("last_result_ts")), 15),
                          _cell("-" if velocity is None else f"{velocity:.3g} mm/s", 11),
                          _cell(zone, 4, zone, color), _cell(alert, 6, alert, color),
                          _cell(f"flagged: {quality}" if quality
                                else _finding_words(p.get("finding")), finding_w)]
            lines.append(" ".join(cells).rstrip())
    if not agent_keys:
        lines.append("(nothing received yet)")
    lines.append("")
    lines.append(_paint("ALERTS (newest first)", "bold", color))
    recent = list(snapshot["alerts"])[-alert_lines:][::-1]
    if not recent:
        lines.append("(none)")
    for a in recent:
        head = (f"{_short_ts(a['ts'])}  {a['site']}/{a['agent']}/{a['point']}  "
                f"{a.get('previous') or '-'} -> ")
        tail = f"{'  (retained)' if a.get('retained') else ''}  {a.get('text', '')}"
        line = sanitize(head + a["state"] + tail, 10_000)
        line = line if len(line) <= width else line[:width - 1] + "…"
        if color:
            line = line.replace(f"-> {a['state']}", "-> " + _paint(a["state"], a["state"], True), 1)
        lines.append(line)
    if snapshot["malformed"]:
        m = snapshot["malformed"][-1]
        lines.append("")
        lines.append(_paint(sanitize(f"malformed messages: {t['malformed']} (latest: {m['topic']}: "
                                     f"{m['error']})", width), "red", color))
    gappy = [s for s in snapshot["streams"] if s["gaps"] or s["duplicates"]]
    if gappy:
        lines.append("")
        lines.append("sequence: " + "; ".join(
            sanitize(f"{s['agent']}/{s['point'] or '-'}/{s['kind']} {s['gaps']} missing "
                     f"{s['duplicates']} dup", 80) for s in gappy[:6]))
    return "\n".join(lines)


_MARKERS = (("bpfo", "O", "BPFO"), ("bpfi", "I", "BPFI"), ("bsf2", "B", "2xBSF"),
            ("ftf", "F", "FTF"), ("shaft", "S", "shaft"))


def render_spectrum(spectrum, width=72, height=12, bar="#", harmonics=5):
    """A text plot of an envelope spectrum with defect-frequency markers.

    Parameters
    ----------
    spectrum : dict
        A spectrum message body (``f0_hz``, ``df_hz``, ``amplitude``,
        ``markers``, optionally ``unit``, ``band_hz``, ``point``, ``ts``).
    width : int, optional
        Plot columns; each column shows the highest bin it covers.
    height : int, optional
        Plot rows.
    bar : str, optional
        The character of the bars (``"#"``, or ``"█"`` on UTF-8 terminals).
    harmonics : int, optional
        Harmonics of each defect frequency marked (fundamental uppercase,
        higher harmonics lowercase).

    Returns
    -------
    str
        Title, ``height`` plot rows, the axis, the marker row, frequency
        labels and a legend.

    Notes
    -----
    Column ``c`` covers bins ``[c*n/width, (c+1)*n/width)``; a marker at
    frequency ``f`` goes to the column holding bin ``round((f - f0)/df)``, so a
    line and its marker share the column.
    """
    for name, value, lo in (("width", width, 16), ("height", height, 2), ("harmonics", harmonics, 1)):
        if not isinstance(value, int) or value < lo:
            raise ValueError(f"{name}={value!r} must be a whole number >= {lo}")
    if not isinstance(bar, str) or len(bar) != 1:
        raise ValueError(f"{bar=} must be one character")
    amp = [a if _is_num(a) and a > 0 else 0.0 for a in spectrum["amplitude"]]
    f0, df = float(spectrum["f0_hz"]), float(spectrum["df_hz"])
    n = len(amp)
    cols = min(width, n)
    col_of_bin = [i * cols // n for i in range(n)]
    peaks = [0.0] * cols
    for i, a in enumerate(amp):
        c = col_of_bin[i]
        peaks[c] = max(peaks[c], a)
    top = max(peaks) or 1.0
    heights = [round(v / top * height) for v in peaks]

    title = (f"envelope spectrum  {sanitize(spectrum.get('point', ''), 40)}  "
             f"{_short_ts(spectrum.get('ts'))}  peak {top:.3g} {sanitize(spectrum.get('unit', ''), 12)}")
    band = spectrum.get("band_hz")
    if isinstance(band, list) and len(band) == 2 and all(_is_num(b) for b in band):
        title += f"  band {band[0]:g}-{band[1]:g} Hz"
    lines = [title]
    label_w = 9
    for row in range(height, 0, -1):
        label = f"{top * row / height:.2g}" if row in (height, (height + 1) // 2) else ""
        lines.append((label.rjust(label_w) + " |"
                      + "".join(bar if h >= row else " " for h in heights)).rstrip())
    lines.append(" " * label_w + " +" + "-" * cols)

    marks = [" "] * cols
    legend = []
    markers = spectrum.get("markers") or {}
    for key, letter, label in _MARKERS:
        hz = markers.get(key)
        if not _is_num(hz) or hz <= 0:
            continue
        legend.append(f"{letter} {label} {hz:.4g} Hz")
        top_k = 1 if key == "shaft" else harmonics
        for k in range(top_k, 0, -1):
            i = round((k * hz - f0) / df)
            if 0 <= i < n:
                c = col_of_bin[i]
                ch = letter if k == 1 else letter.lower()
                if k == 1 or marks[c] == " ":
                    marks[c] = ch
    lines.append(" " * label_w + "  " + "".join(marks).rstrip())
    f_end = f0 + df * n
    left, mid, right = f"{f0:g} Hz", f"{(f0 + f_end) / 2:.4g}", f"{f_end:.4g} Hz"
    axis = list(" " * cols)
    for pos, text in ((0, left), (max(0, cols // 2 - len(mid) // 2), mid),
                      (max(0, cols - len(right)), right)):
        axis[pos:pos + len(text)] = text
    lines.append(" " * label_w + "  " + "".join(axis)[:cols + 8])
    lines.append("markers: " + ("; ".join(legend) if legend else "none")
                 + ("  (lowercase: harmonics)" if legend else ""))
    return "\n".join(lines)


def render_event(event):
    """One line describing a received message (output that is not a terminal).

    Parameters
    ----------
    event : dict
        From :meth:`DashboardModel.handle`.

    Returns
    -------
    str
    """
    where = "/".join(x for x in (event.get("site"), event.get("agent"), event.get("point")) if x)
    outcome = event["outcome"]
    if outcome == "foreign":
        return f"ignored topic {event['topic']}"
    head = f"{where} {event['kind']}"
    if outcome == "malformed":
        return sanitize(f"MALFORMED {head}: {event['error']}", 400)
    seq = f" seq {event['seq']}" if event.get("seq") is not None else ""
    if outcome != "applied":
        return sanitize(f"{outcome} {head}{seq}", 400)
    body = event["body"]
    gap = f" ({event['gap']} missing before)" if event.get("gap") else ""
    ts = _short_ts(body.get("ts"))
    if event["kind"] == "status":
        text = f"{body['state']} version {body.get('version', '?')}"
    elif event["kind"] == "result":
        lv = body["levels"]
        quality = ",".join(body.get("quality") or [])
        text = (f"velocity {_fmt(lv.get('velocity_rms_mm_s'))} mm/s zone {lv.get('iso_zone') or '-'} "
                f"accel {_fmt(lv.get('accel_rms_m_s2'))} m/s² finding "
                f"{_finding_words(_strongest(body.get('findings', []), body.get('defects', {})))} "
                f"alert {body.get('alert') or '-'}" + (f" flagged {quality}" if quality else ""))
    elif event["kind"] == "alert":
        text = (f"{body.get('previous') or '-'} -> {body['state']}"
                f"{' (retained)' if event.get('retained') else ''}: {body.get('text', '')}")
    else:
        text = f"{len(body['amplitude'])} bins, df {body['df_hz']:.3g} Hz"
    return sanitize(f"{ts} {head}{seq}{gap} {text}", 1000)
