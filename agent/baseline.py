"""Learnt baselines of each measurement point, kept on disk.

Public API
----------
- :class:`Baseline` -- the learnt reference levels of one point (frozen).
- :class:`BaselineStore(state_dir)` -- one JSON file per point under
  ``<state_dir>/baselines/``: :meth:`~BaselineStore.load`,
  :meth:`~BaselineStore.get`, :meth:`~BaselineStore.learn`,
  :meth:`~BaselineStore.progress`, :meth:`~BaselineStore.reset`,
  :meth:`~BaselineStore.alert_state`, :meth:`~BaselineStore.set_alert_state`.
- :func:`reset_baselines(state_dir, point=None)` -> names of the points reset
  (the ``ballpass baseline --reset`` command).
- :data:`BASELINE_INDICATORS` -- the indicator names a baseline holds.

A baseline is the median of the first ``baseline_captures`` good (unflagged)
captures of a point: velocity RMS, acceleration RMS and the amplitude of each
bearing defect line.  The median keeps one odd capture (a valve slamming, a
sensor knocked during commissioning) from moving the reference.  It is learnt
once, on a machine assumed healthy at commissioning, and kept until reset.

The same file also keeps the point's current alert state, so that after a
restart the alert engine continues from where it was instead of announcing
the same state again (or never clearing a retained alarm).

Every write goes to a temporary file in the same folder, is flushed with
``fsync`` and then renamed over the old file with :func:`os.replace`, so a
power cut leaves either the old or the new file, never a torn one.
"""

from __future__ import annotations

import json
import logging
import math
import os
import statistics
from dataclasses import dataclass, field
from pathlib import Path

from agent.atomic import write_text_atomic

__all__ = ["Baseline", "BaselineStore", "reset_baselines", "BASELINE_INDICATORS",
           "DEFECT_KEYS"]

log = logging.getLogger(__name__)

DEFECT_KEYS = ("bpfo", "bpfi", "bsf", "ftf")
BASELINE_INDICATORS = ("velocity_rms_mm_s", "accel_rms_m_s2") + tuple(
    f"{key}_amplitude" for key in DEFECT_KEYS)
_FILE_VERSION = 1
_ALERT_STATES = ("normal", "watch", "act")


@dataclass(frozen=True)
class Baseline:
    """The learnt reference levels of one point.

    Attributes
    ----------
    point : str
        Point name.
    captures : int
        How many good captures the medians were taken over.
    values : dict of str to float
        Median of each indicator in :data:`BASELINE_INDICATORS` that was
        present and finite in the learnt captures (same units as in the
        analysis: mm/s, m/s², envelope amplitude).
    """

    point: str
    captures: int
    values: dict = field(default_factory=dict)


def _indicator_values(analysis):
    """The baseline indicators of one analysis dict (missing ones omitted)."""
    levels = analysis.get("levels") or {}
    defects = analysis.get("defects") or {}
    out = {}
    for name in ("velocity_rms_mm_s", "accel_rms_m_s2"):
        out[name] = levels.get(name)
    for key in DEFECT_KEYS:
        out[f"{key}_amplitude"] = (defects.get(key) or {}).get("amplitude")
    return {k: float(v) for k, v in out.items()
            if isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)}


class _PointRecord:
    """Mutable on-disk record of one point (private)."""

    __slots__ = ("samples", "baseline", "captures", "alert_state")

    def __init__(self):
        self.samples = {name: [] for name in BASELINE_INDICATORS}
        self.baseline = None        # dict of medians once learnt
        self.captures = 0
        self.alert_state = "normal"

    def to_json(self, point):
        return {"version": _FILE_VERSION, "point": point, "captures": self.captures,
                "samples": None if self.baseline is not None else self.samples,
                "baseline": self.baseline, "alert_state": self.alert_state}

    @classmethod
    def from_json(cls, data, point):
        if not isinstance(data, dict) or data.get("version") != _FILE_VERSION:
            raise ValueError("not a baseline file of this version")
        if data.get("point") != point:
            raise ValueError(f"holds point {data.get('point')!r}, not {point!r}")
        rec = cls()
        rec.captures = int(data.get("captures", 0))
        state = data.get("alert_state", "normal")
        if state not in _ALERT_STATES:
            raise ValueError(f"alert_state={state!r} is not one of {_ALERT_STATES}")
        rec.alert_state = state
        baseline = data.get("baseline")
        if baseline is not None:
            if not isinstance(baseline, dict) or not all(
                    k in BASELINE_INDICATORS and isinstance(v, (int, float)) and math.isfinite(v)
                    for k, v in baseline.items()):
                raise ValueError("baseline must map indicator names to finite numbers")
            rec.baseline = {k: float(v) for k, v in baseline.items()}
        else:
            samples = data.get("samples") or {}
            for name in BASELINE_INDICATORS:
                values = samples.get(name, [])
                if not isinstance(values, list) or not all(
                        isinstance(v, (int, float)) and math.isfinite(v) for v in values):
                    raise ValueError(f"samples.{name} must be a list of finite numbers")
                rec.samples[name] = [float(v) for v in values]
        return rec


class BaselineStore:
    """Baselines and alert states of all points, one JSON file per point.

    Parameters
    ----------
    state_dir : str or Path
        The agent's state directory; files go to ``<state_dir>/baselines/``.
        It is created on the first write.

    Notes
    -----
    Memory is bounded: while a point is learning, the store keeps at most
    ``captures_needed`` values per indicator; once learnt, only the medians.
    Not thread-safe: one alert engine per point, all driven from one thread.
    """

    def __init__(self, state_dir):
        if state_dir is None:
            raise ValueError(f"{state_dir=} must be a directory path")
        self.state_dir = Path(state_dir)
        self.folder = self.state_dir / "baselines"
        self._records = {}
        self._stamps = {}           # point -> identity of the file last read or written
        self._loaded = False

    # ------------------------------------------------------------------ files
    def path_for(self, point):
        """The file of one point.

        Parameters
        ----------
        point : str
            Point name (a valid MQTT topic level, as checked by the config).

        Returns
        -------
        Path
        """
        if not point or "/" in point or "\0" in point or point in (".", ".."):
            raise ValueError(f"{point=} must be a point name without '/'")
        return self.folder / f"{point}.json"

    def load(self):
        """Read every point file of the folder.

        Returns
        -------
        dict of str to Baseline or None
            Each point found and its baseline (``None`` while still learning).

        Notes
        -----
        A file that cannot be parsed (edited by hand, another version) is
        logged as a warning and ignored: that point learns again.
        """
        self._records = {}
        self._stamps = {}
        self._loaded = True
        if self.folder.is_dir():
            for path in sorted(self.folder.glob("*.json")):
                point = path.name[:-len(".json")]
                self._stamps[point] = _stamp(path)
                record = self._read(path, point)
                if record is not None:
                    self._records[point] = record
        return {p: self.get(p) for p in self._records}

    def _read(self, path, point):
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
            return _PointRecord.from_json(data, point)
        except FileNotFoundError:
            return None
        except (OSError, UnicodeDecodeError, ValueError, TypeError) as exc:
            log.warning("baseline file %s ignored, point %r will learn again: %s", path, point, exc)
            return None

    def _record(self, point):
        """The record of a point, read again when its file changed on disk.

        ``ballpass baseline --reset`` rewrites the file while the daemon runs;
        one ``stat`` per call notices it, so the daemon neither keeps using
        the old baseline nor writes it back.
        """
        if not self._loaded:
            self.load()
        path = self.path_for(point)
        stamp = _stamp(path)
        rec = self._records.get(point)
        if rec is not None and stamp == self._stamps.get(point):
            return rec
        fresh = self._read(path, point) if stamp is not None else None
        if fresh is None:
            fresh = _PointRecord()
            if rec is not None:
                fresh.alert_state = rec.alert_state   # file removed: keep what was announced
        self._records[point] = fresh
        self._stamps[point] = stamp
        return fresh

    def _write(self, point):
        rec = self._records[point]
        path = self.path_for(point)
        text = json.dumps(rec.to_json(point), separators=(",", ":"), sort_keys=True)
        write_text_atomic(path, text)
        self._stamps[point] = _stamp(path)

    # --------------------------------------------------------------- baseline
    def get(self, point):
        """The learnt baseline of a point.

        Returns
        -------
        Baseline or None
            ``None`` until the point has finished learning.
        """
        rec = self._record(point)
        if rec.baseline is None:
            return None
        return Baseline(point=point, captures=rec.captures, values=dict(rec.baseline))

    def progress(self, point):
        """How many good captures a point has learnt so far.

        Returns
        -------
        int
        """
        return self._record(point).captures

    def learn(self, point, analysis, captures_needed):
        """Add one good capture to a point that is still learning.

        Parameters
        ----------
        point : str
            Point name.
        analysis : dict
            The analysis result (``Analysis.to_dict()``).  Captures with any
            quality flag are refused (return ``False``) and never learnt.
        captures_needed : int
            Captures the baseline is taken over (``alerts.baseline_captures``);
            0 disables learning.

        Returns
        -------
        bool
            True when this capture completed the baseline.
        """
        if not (isinstance(captures_needed, int) and captures_needed >= 0):
            raise ValueError(f"{captures_needed=} must be a whole number >= 0")
        if captures_needed == 0 or analysis.get("quality"):
            return False
        rec = self._record(point)
        if rec.baseline is not None:
            return False
        for name, value in _indicator_values(analysis).items():
            rec.samples[name].append(value)
        rec.captures += 1
        done = rec.captures >= captures_needed
        if done:
            rec.baseline = {name: statistics.median(values)
                            for name, values in rec.samples.items() if values}
            rec.samples = {name: [] for name in BASELINE_INDICATORS}
        self._write(point)
        return done

    def reset(self, point=None):
        """Forget the baseline of one point or of all points.

        Parameters
        ----------
        point : str, optional
            The point to reset; ``None`` resets every point with a file.

        Returns
        -------
        list of str
            Names of the points whose baseline (or learning progress) was
            discarded, sorted.  The alert state is kept.
        """
        if not self._loaded:
            self.load()
        if point is None:
            on_disk = {p.name[:-len(".json")] for p in self.folder.glob("*.json")} \
                if self.folder.is_dir() else set()
            names = sorted(on_disk | set(self._records))
        else:
            names = [point]
        done = []
        for name in names:
            if not self.path_for(name).exists():
                continue
            rec = self._record(name)
            if rec.baseline is None and rec.captures == 0:
                continue
            rec.baseline = None
            rec.captures = 0
            rec.samples = {k: [] for k in BASELINE_INDICATORS}
            self._write(name)
            done.append(name)
        return done

    # ------------------------------------------------------------ alert state
    def alert_state(self, point):
        """The last alert state stored for a point (``"normal"`` if none)."""
        return self._record(point).alert_state

    def set_alert_state(self, point, state):
        """Store the alert state of a point (written to disk at once).

        Parameters
        ----------
        point : str
        state : {"normal", "watch", "act"}
        """
        if state not in _ALERT_STATES:
            raise ValueError(f"{state=} must be one of {_ALERT_STATES}")
        rec = self._record(point)
        if rec.alert_state != state:
            rec.alert_state = state
            self._write(point)


def _stamp(path):
    """Identity of a file's current version (None when it does not exist)."""
    try:
        st = os.stat(path)
    except FileNotFoundError:
        return None
    return (st.st_ino, st.st_mtime_ns, st.st_size)


def reset_baselines(state_dir, point=None):
    """Discard learnt baselines on disk (``ballpass baseline --reset``).

    Parameters
    ----------
    state_dir : str or Path
        The agent's state directory (``agent.state_dir``).
    point : str, optional
        Only this point; ``None`` resets every point that has a baseline file.

    Returns
    -------
    list of str
        The points reset (empty when there was nothing to reset).  A running
        daemon notices the rewritten file at its next capture and learns again.
    """
    return BaselineStore(state_dir).reset(point)
