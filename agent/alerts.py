"""Alert states of a measurement point: rules, hysteresis, debounce, plain words.

Public API
----------
- :data:`STATES` -- ``("normal", "watch", "act")``, in rising order;
  :data:`NORMAL`, :data:`WATCH`, :data:`ACT`.
- :data:`CAUTION` -- the fixed caution sentence every alert carries.
- :class:`AlertChange` -- a change of the debounced state (frozen), with the
  reasons and a plain-words explanation; :meth:`AlertChange.to_dict`.
- :class:`AlertEngine(point, settings, baseline_store)` -- one per point;
  :meth:`AlertEngine.update(analysis)` -> :class:`AlertChange` or ``None``.
- :func:`state_rank(state)` -> 0, 1 or 2.

Indicators
----------
Each good capture is judged on every indicator below; each proposes a level
(normal, watch or act) and the point proposes the highest of them.

========================  ===============================  ==============
indicator                 watch / act                      ``limit_kind``
========================  ===============================  ==============
velocity RMS              ISO 20816-3 zone C / zone D      ``iso_zone``
velocity, accel RMS       ``point.limits`` ``*_watch/act``  ``absolute``
crest factor, kurtosis    ``point.limits`` ``*_watch``      ``absolute``
velocity, accel RMS,      ratio to the learnt baseline     ``baseline``
defect line amplitude     >= watch / act ratio
bearing defect finding    SNR >= watch dB / SNR >= act dB  ``defect``
                          with at least 3 harmonics
========================  ===============================  ==============

Hysteresis: an indicator that stood at a level keeps it while its value stays
at or above ``hysteresis x limit`` of that level (never above the point's
current state, so it only ever delays a clear, never speeds up a raise); the
three-harmonic condition of a defect applies to reaching act, holding it
needs the SNR only.
Debounce: the state rises after ``raise_after`` consecutive captures that all
propose a higher level (to the lowest of them) and falls after
``clear_after`` consecutive captures that all propose a lower one (to the
highest of them).

A capture with any quality flag is ignored: it changes neither the state, the
debounce counts, nor the baseline.  The state is stored with the baseline, so
a restart continues from it.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass, field

from agent.baseline import DEFECT_KEYS
from agent.findings import DEFECTS, modulation_meaning, sidebands_resolved
from agent.dsp.iso import zone_limits_mm_s
from agent.safety import CAUTION

__all__ = ["STATES", "NORMAL", "WATCH", "ACT", "CAUTION", "AlertChange", "AlertEngine",
           "state_rank", "DEFECT_NAMES"]

NORMAL, WATCH, ACT = "normal", "watch", "act"
STATES = (NORMAL, WATCH, ACT)
_RANK = {s: i for i, s in enumerate(STATES)}
_ZONE_LEVEL = {"A": 0, "B": 0, "C": 1, "D": 2}
_MIN_ACT_HARMONICS = 3


#: defect key -> (plain name of the damaged part, frequency label)
DEFECT_NAMES = {key: (what, label) for key, (label, what, _) in DEFECTS.items()}

# (label, unit) of the level indicators, for the plain-words text.
_LABELS = {
    "velocity_rms_mm_s": ("Velocity", "mm/s RMS"),
    "accel_rms_m_s2": ("Acceleration", "m/s² RMS"),
    "crest_factor": ("Crest factor", ""),
    "kurtosis": ("Kurtosis", ""),
}
for _key in DEFECT_KEYS:
    _LABELS[f"{_key}_amplitude"] = (f"Envelope amplitude at {DEFECT_NAMES[_key][1]}", "")
del _key

_KIND_ORDER = {"defect": 0, "iso_zone": 1, "absolute": 2, "baseline": 3}


def state_rank(state):
    """Order of an alert state: normal 0, watch 1, act 2.

    Parameters
    ----------
    state : str

    Returns
    -------
    int
    """
    try:
        return _RANK[state]
    except KeyError:
        raise ValueError(f"{state=} must be one of {STATES}") from None


def _sig3(x):
    """Round to 3 significant figures (for payloads)."""
    return float(f"{x:.3g}")


def _num(x):
    """A finite float, or None for anything else (missing, null, NaN, bool)."""
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        return None
    x = float(x)
    return x if x == x and abs(x) != float("inf") else None


@dataclass(frozen=True)
class AlertChange:
    """A change of the debounced alert state of one point.

    Attributes
    ----------
    point : str
    state, previous : {"normal", "watch", "act"}
    reasons : list of dict
        Indicators at or above watch in the capture that made the change,
        highest level first; each ``{"indicator", "value", "limit",
        "limit_kind", "text"}``.  ``limit`` is the limit of the level the
        indicator stands at (value and limit rounded to 3 significant
        figures); ``limit_kind`` is ``"iso_zone"``, ``"absolute"``,
        ``"baseline"`` or ``"defect"``.  Empty when the state falls to normal.
    text : str
        Plain words: what changed, how much, against which limit, with the
        defect and modulation evidence.
    caution : str
        :data:`CAUTION`.
    """

    point: str
    state: str
    previous: str
    reasons: list = field(default_factory=list)
    text: str = ""
    caution: str = CAUTION

    def to_dict(self):
        """The alert message fields (without the common envelope fields).

        Returns
        -------
        dict
            ``point``, ``state``, ``previous``, ``reasons``, ``text``,
            ``caution``.
        """
        return {"point": self.point, "state": self.state, "previous": self.previous,
                "reasons": [dict(r) for r in self.reasons], "text": self.text,
                "caution": self.caution}


@dataclass(frozen=True)
class _Reading:
    """One indicator in one capture (private)."""

    key: str            # unique per indicator and limit kind
    indicator: str      # name in the reasons
    value: float
    watch: float | None
    act: float | None
    kind: str
    raw: int            # level from the limits themselves
    describe: object    # callable(level, held, limit) -> str


def _level(value, watch, act, factor=1.0):
    if act is not None and value >= factor * act:
        return 2
    if watch is not None and value >= factor * watch:
        return 1
    return 0


class AlertEngine:
    """The alert state machine of one point.

    Parameters
    ----------
    point : PointSettings
        The point: its name, ISO group and support, and optional limits.
    settings : AlertSettings
        Debounce, hysteresis, baseline and defect thresholds.
    baseline_store : BaselineStore or None
        Where the baseline is learnt and the state is kept; ``None`` runs
        without baseline indicators and without persistence.

    Notes
    -----
    Memory is fixed: the debounce history holds at most
    ``max(raise_after, clear_after)`` levels, and one level is kept per
    indicator (a fixed set given by the config).
    """

    def __init__(self, point, settings, baseline_store):
        self.point = point
        self.settings = settings
        self.store = baseline_store
        group, support = point.machine.iso_group, point.machine.support
        self.zone_limits_mm_s = zone_limits_mm_s(group, support)
        self._history = deque(maxlen=max(settings.raise_after, settings.clear_after))
        self._levels = None         # per indicator; None until the first good capture
        if baseline_store is not None:
            self._state = baseline_store.alert_state(point.name)
        else:
            self._state = NORMAL

    @property
    def state(self):
        """The current debounced state (``"normal"``, ``"watch"`` or ``"act"``)."""
        return self._state

    @property
    def baseline(self):
        """The learnt :class:`~agent.baseline.Baseline`, or ``None``."""
        return None if self.store is None else self.store.get(self.point.name)

    # ---------------------------------------------------------------- update
    def update(self, analysis):
        """Judge one capture.

        Parameters
        ----------
        analysis : dict
            ``Analysis.to_dict()`` of this point.

        Returns
        -------
        AlertChange or None
            The change when the debounced state changed, else ``None``.
            Captures with a quality flag always give ``None`` and are not
            learnt into the baseline.
        """
        if not isinstance(analysis, dict):
            raise ValueError(f"analysis must be a dict, not {type(analysis).__name__}")
        if analysis.get("point", self.point.name) != self.point.name:
            raise ValueError(f"analysis['point']={analysis.get('point')!r} is not this "
                             f"engine's point {self.point.name!r}")
        if analysis.get("quality"):
            return None

        current = _RANK[self._state]
        readings = self._readings(analysis)
        levels = {}
        h = self.settings.hysteresis
        # after a restart the stored state is taken as every indicator's last level,
        # so hysteresis holds across restarts as it does between captures
        before = self._levels if self._levels is not None else {}
        default = 0 if self._levels is not None else current
        for r in readings:
            carried = min(_level(r.value, r.watch, r.act, h), before.get(r.key, default), current)
            levels[r.key] = max(r.raw, carried)
        self._levels = levels
        proposed = max(levels.values(), default=0)
        self._history.append(proposed)

        if self.store is not None:
            self.store.learn(self.point.name, analysis, self.settings.baseline_captures)

        new = current
        recent = list(self._history)
        up = recent[-self.settings.raise_after:]
        down = recent[-self.settings.clear_after:]
        if len(up) == self.settings.raise_after and all(x > current for x in up):
            new = min(up)
        elif len(down) == self.settings.clear_after and all(x < current for x in down):
            new = max(down)
        if new == current:
            return None

        previous, self._state = self._state, STATES[new]
        if self.store is not None:
            self.store.set_alert_state(self.point.name, self._state)
        return self._change(previous, readings, levels, analysis)

    # -------------------------------------------------------------- readings
    def _readings(self, analysis):
        levels = analysis.get("levels") or {}
        limits = self.point.limits
        out = []

        velocity = _num(levels.get("velocity_rms_mm_s"))
        if velocity is not None:
            _ab, bc, cd = self.zone_limits_mm_s
            zone = levels.get("iso_zone")
            raw = _ZONE_LEVEL[zone] if zone in _ZONE_LEVEL else _level(velocity, bc, cd)
            out.append(_Reading("iso", "velocity_rms_mm_s", velocity, bc, cd, "iso_zone", raw,
                                self._iso_text(velocity, zone)))

        for indicator, watch, act in (
                ("velocity_rms_mm_s", limits.velocity_watch_mm_s, limits.velocity_act_mm_s),
                ("accel_rms_m_s2", limits.accel_rms_watch_m_s2, limits.accel_rms_act_m_s2),
                ("crest_factor", limits.crest_factor_watch, None),
                ("kurtosis", limits.kurtosis_watch, None)):
            value = _num(levels.get(indicator))
            if value is None or (watch is None and act is None):
                continue
            out.append(_Reading(f"absolute:{indicator}", indicator, value, watch, act,
                                "absolute", _level(value, watch, act),
                                self._absolute_text(indicator, value)))

        baseline = self.baseline
        if baseline is not None:
            defects = analysis.get("defects") or {}
            candidates = [(n, _num(levels.get(n))) for n in ("velocity_rms_mm_s", "accel_rms_m_s2")]
            for key in DEFECT_KEYS:
                d = defects.get(key) or {}
                # a ratio of noise to noise means nothing: only lines actually found count
                if d.get("found_hz") is not None:
                    candidates.append((f"{key}_amplitude", _num(d.get("amplitude"))))
            for indicator, value in candidates:
                ref = baseline.values.get(indicator)
                if value is None or ref is None or ref <= 0:
                    continue
                watch = ref * self.settings.baseline_watch_ratio
                act = ref * self.settings.baseline_act_ratio
                out.append(_Reading(f"baseline:{indicator}", indicator, value, watch, act,
                                    "baseline", _level(value, watch, act),
                                    self._baseline_text(indicator, value, ref)))

        out.extend(self._defect_readings(analysis))
        return out

    def _defect_readings(self, analysis):
        defects = analysis.get("defects") or {}
        out = []
        seen = set()
        for finding in analysis.get("findings") or ():
            key = finding.get("defect") if isinstance(finding, dict) else None
            if key not in DEFECT_NAMES or key in seen:
                continue
            seen.add(key)
            d = defects.get(key) or {}
            snr = _num(d.get("snr_db"))
            if snr is None:
                continue
            harmonics = d.get("harmonics") if isinstance(d.get("harmonics"), int) else 0
            watch, act = self.settings.defect_watch_snr_db, self.settings.defect_act_snr_db
            raw = 2 if (snr >= act and harmonics >= _MIN_ACT_HARMONICS) else int(snr >= watch)
            resolved = sidebands_resolved(_num(d.get("modulation_hz")),
                                          _num((analysis.get("envelope") or {}).get("resolution_hz")))
            out.append(_Reading(f"defect:{key}", f"{key}_snr_db", snr, watch, act, "defect", raw,
                                self._defect_text(key, d, finding, snr, harmonics, resolved)))
        return out

    # ------------------------------------------------------------------ text
    def _hold_text(self, held, limit, unit=""):
        if not held:
            return ""
        return (f" It has not yet fallen below {self.settings.hysteresis * limit:.3g}{unit} "
                f"({self.settings.hysteresis:g} x that limit), so the level is held.")

    def _iso_text(self, velocity, zone):
        m = self.point.machine
        _ab, bc, cd = self.zone_limits_mm_s
        zone_words = f"in ISO 20816-3 zone {zone}" if zone in _ZONE_LEVEL else "measured"

        def describe(level, held, limit):
            return (f"Velocity {velocity:.3g} mm/s RMS is {zone_words} (group {m.iso_group}, "
                    f"{m.support} support: zone C from {bc:g} mm/s, zone D from {cd:g} mm/s)."
                    + self._hold_text(held, limit, " mm/s"))
        return describe

    def _absolute_text(self, indicator, value):
        label, unit = _LABELS[indicator]
        unit = f" {unit}" if unit else ""

        def describe(level, held, limit):
            verb = "has been at or above" if held else "is at or above"
            return (f"{label} {value:.3g}{unit} {verb} this point's {STATES[level]} limit of "
                    f"{limit:g}{unit}." + self._hold_text(held, limit, unit))
        return describe

    def _baseline_text(self, indicator, value, ref):
        label, unit = _LABELS[indicator]
        unit = f" {unit}" if unit else ""
        s = self.settings

        def describe(level, held, limit):
            ratio = s.baseline_act_ratio if level == 2 else s.baseline_watch_ratio
            return (f"{label} {value:.3g}{unit} is {value / ref:.2g} x its learnt baseline of "
                    f"{ref:.3g}{unit} ({STATES[level]} from {ratio:g} x)."
                    + self._hold_text(held, limit, unit))
        return describe

    def _defect_text(self, key, d, finding, snr, harmonics, resolved=True):
        part, label = DEFECT_NAMES[key]
        freq = _num(d.get("found_hz"))
        if freq is None:
            freq = _num(d.get("expected_hz"))
        freq_words = f"{label} {freq:.3g} Hz" if freq is not None else label
        plural = "harmonic" if harmonics == 1 else "harmonics"
        meaning = modulation_meaning(key, finding.get("modulation", "none"), resolved)
        meaning = f" {meaning}" if meaning else ""
        s = self.settings

        def describe(level, held, limit):
            if level == 2:
                rule = (f"act from {s.defect_act_snr_db:g} dB with at least "
                        f"{_MIN_ACT_HARMONICS} harmonics")
            else:
                rule = f"watch from {s.defect_watch_snr_db:g} dB"
            return (f"{part} defect signature ({freq_words}, {harmonics} {plural}, {snr:.0f} dB "
                    f"over the noise floor){meaning}; {rule}."
                    + self._hold_text(held, limit, " dB"))
        return describe

    def _change(self, previous, readings, levels, analysis):
        name = self.point.name
        rank_new, rank_old = _RANK[self._state], _RANK[previous]
        reasons = []
        if rank_new > 0:
            ordered = sorted((r for r in readings if levels[r.key] > 0),
                             key=lambda r: (-levels[r.key], _KIND_ORDER[r.kind], r.indicator))
            for r in ordered:
                level = levels[r.key]
                limit = r.act if level == 2 else r.watch
                held = r.raw < level
                reasons.append({"indicator": r.indicator, "value": _sig3(r.value),
                                "limit": _sig3(limit), "limit_kind": r.kind,
                                "text": r.describe(level, held, limit)})
        if rank_new > rank_old:
            head = f"{name}: alert raised from {previous} to {self._state}."
        elif rank_new > 0:
            head = f"{name}: alert lowered from {previous} to {self._state}."
        else:
            head = (f"{name}: back to normal from {previous}; no indicator has been at its "
                    f"watch limit (allowing for hysteresis) for {self.settings.clear_after} "
                    f"good captures.")
            velocity = _num((analysis.get("levels") or {}).get("velocity_rms_mm_s"))
            zone = (analysis.get("levels") or {}).get("iso_zone")
            if velocity is not None:
                head += f" Velocity now {velocity:.3g} mm/s RMS" + (
                    f" (ISO zone {zone})." if zone in _ZONE_LEVEL else ".")
        text = " ".join([head] + [r["text"] for r in reasons])
        return AlertChange(point=name, state=self._state, previous=previous,
                           reasons=reasons, text=text, caution=CAUTION)
