"""Calibration: source units to m/s^2, field checks against a reference shaker.

Public API
----------
- :func:`scale_m_s2_per_unit(point, source_unit, override=None)` -> float,
  the factor from a source's unit to acceleration in m/s^2.
- :func:`measure_sensitivity(samples_m_s2_as_configured, sample_rate_hz,
  reference_m_s2, reference_hz, configured_mv_per_m_s2)` -> dict, the
  sensitivity a recording of a reference shaker implies, with a verdict.
- :func:`calibrate(config, point_name, reference_m_s2, reference_hz, seconds)`
  -> dict, the ``ballpass calibrate`` command: capture from the configured
  source, measure, and keep a correction in the state directory.
- :func:`load_overrides(state_dir)` -> ``{point_name: mv_per_m_s2}``,
  :func:`save_override`, :func:`clear_override`, :func:`overrides_path`.
- ``CALIBRATION_FILE`` (``calibration.json``), ``TOLERANCE`` (0.05).

Corrections are kept in ``<state_dir>/calibration.json`` (written atomically:
a temporary file in the same directory, flushed, then ``os.replace``); the
user's configuration file is never rewritten.  An override replaces the
point's configured ``sensitivity_mv_per_m_s2`` wherever samples are turned
into acceleration.
"""

from __future__ import annotations

import json
import math
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from agent.atomic import write_text_atomic
from agent.errors import ConfigError

__all__ = ["scale_m_s2_per_unit", "input_scaling", "measure_sensitivity", "calibrate", "load_overrides",
           "save_override", "clear_override", "overrides_path", "effective_sensitivity",
           "CALIBRATION_FILE", "TOLERANCE"]

CALIBRATION_FILE = "calibration.json"
SCHEMA = "ballpass.calibration/1"
TOLERANCE = 0.05          # accepted relative deviation of a sensitivity (common practice)
MIN_SNR_DB = 20.0         # reference line over the neighbouring noise for a trusted result
_BAND_FRACTION = 0.01     # half-width of the reference band relative to its frequency
_SNR_CAP_DB = 200.0
_BAND_MIN_BINS = 4        # ... and at least this many bins (Hann main lobe is +-2)


# --------------------------------------------------------------------------- scale
def effective_sensitivity(point, override=None):
    """The sensitivity in force for a point, mV/(m/s^2): override or configured."""
    if override is None:
        return point.sensitivity_mv_per_m_s2
    if not (isinstance(override, (int, float)) and math.isfinite(override) and override > 0):
        raise ValueError(f"{override=} must be a sensitivity > 0 in mV/(m/s^2)")
    return float(override)


def scale_m_s2_per_unit(point, source_unit, override=None):
    """Factor that turns a source's samples into acceleration in m/s^2.

    Parameters
    ----------
    point : agent.config.PointSettings
        Gives ``sensitivity_mv_per_m_s2`` and ``full_scale_v``.
    source_unit : str
        ``"full_scale"`` (digital +-1.0), ``"volt"`` or ``"m_s2"``.
    override : float or None
        A measured sensitivity in mV/(m/s^2) replacing the configured one.

    Returns
    -------
    float
        m/s^2 per source unit.

    Notes
    -----
    With sensitivity ``S`` in mV/(m/s^2) and the input's full scale ``V_fs``
    in volts: full scale -> ``V_fs * 1000 / S``; volt -> ``1000 / S``;
    m/s^2 -> 1 (the source is already calibrated, e.g. a digital MEMS
    accelerometer or a float recording).
    """
    if source_unit == "m_s2":
        return 1.0
    sens = effective_sensitivity(point, override)
    if source_unit == "full_scale":
        return point.full_scale_v * 1000.0 / sens
    if source_unit == "volt":
        return 1000.0 / sens
    raise ValueError(f"{source_unit=} must be one of 'full_scale', 'volt', 'm_s2'")


def input_scaling(point, source_unit, override=None):
    """Scale to m/s² and the converter's full scale in m/s², for one point.

    Parameters
    ----------
    point, source_unit, override
        As for :func:`scale_m_s2_per_unit`.

    Returns
    -------
    scale : float
        m/s² per source unit.
    full_scale_m_s2 : float or None
        Known only for digital ±1.0 samples (the clipping check uses it);
        ``None`` for volts and m/s², where clipping shows as a flat top.
    """
    scale = scale_m_s2_per_unit(point, source_unit, override)
    return scale, (scale if source_unit == "full_scale" else None)


# --------------------------------------------------------------------------- measure
def _band_rms(x, sample_rate_hz, f_hz):
    """RMS of the line at ``f_hz`` and of the noise beside it (Hann, Parseval).

    Returns ``(line_rms, noise_rms_in_band, snr_db, half_width_hz)``.
    """
    n = x.shape[0]
    w = np.hanning(n)
    spec = np.fft.rfft((x - x.mean()) * w)
    power = spec.real ** 2 + spec.imag ** 2
    # one-sided: a sine of RMS r gives sum(|X_k|^2) over its lobe = r^2 * N * sum(w^2) / 2
    norm = 2.0 / (n * float(np.sum(w * w)))
    df = sample_rate_hz / n
    half = max(_BAND_FRACTION * f_hz, _BAND_MIN_BINS * df)
    k0 = int(math.floor((f_hz - half) / df))
    k1 = int(math.ceil((f_hz + half) / df))
    k0 = max(k0, 1)
    k1 = min(k1, power.shape[0] - 1)
    width = k1 - k0 + 1
    band = float(np.sum(power[k0:k1 + 1])) * norm
    # noise per bin from the two neighbouring bands of the same width (median: robust)
    lo = power[max(1, k0 - 2 * width):max(1, k0 - width)]
    hi = power[k1 + 1 + width:k1 + 1 + 2 * width]
    beside = np.concatenate([lo, hi])
    noise = float(np.median(beside)) * norm * width if beside.size else 0.0
    line = max(band - noise, 0.0)
    if noise > 0 and line > 0:
        snr_db = min(max(10.0 * math.log10(line / noise), -_SNR_CAP_DB), _SNR_CAP_DB)
    else:
        snr_db = _SNR_CAP_DB if line > 0 else -_SNR_CAP_DB  # finite, so it stays valid JSON
    return math.sqrt(line), math.sqrt(noise), snr_db, half


def measure_sensitivity(samples_m_s2_as_configured, sample_rate_hz, reference_m_s2, reference_hz,
                        configured_mv_per_m_s2, tolerance=TOLERANCE):
    """Sensitivity implied by a recording of a reference shaker (calibrator).

    Parameters
    ----------
    samples_m_s2_as_configured : array_like, shape (n,)
        The point's signal converted to m/s^2 with ``configured_mv_per_m_s2``
        while the sensor sits on a shaker running at ``reference_m_s2`` RMS
        and ``reference_hz``.
    sample_rate_hz : float
        Sample rate of the recording.
    reference_m_s2 : float
        RMS acceleration of the reference, m/s^2 (handheld shakers: 10 m/s^2).
    reference_hz : float
        Frequency of the reference, Hz (handheld shakers: 159.2 Hz).
    configured_mv_per_m_s2 : float
        Sensitivity used to convert the samples, mV/(m/s^2).
    tolerance : float, default 0.05
        Relative deviation still called "ok".

    Returns
    -------
    dict
        ``measured_rms_m_s2`` (the reference line as configured),
        ``measured_mv_per_m_s2``, ``configured_mv_per_m_s2``, ``ratio``
        (measured / configured sensitivity), ``deviation_pct``, ``snr_db``,
        ``band_hz``, ``verdict`` (``"ok"``, ``"adjust"`` or ``"unreliable"``)
        and ``text`` (one plain sentence).

    Notes
    -----
    The line's RMS is the band RMS of a Hann-windowed spectrum (Parseval:
    ``r^2 = 2 * sum_band |X_k|^2 / (N * sum w^2)``) over ``reference_hz +-
    max(1 %, 4 bins)``, so a shaker a little off its nominal frequency is
    still measured in full; the noise in that band, estimated from the
    median of the neighbouring bands, is subtracted.  The sensor's output is
    ``S_true * a_ref``; it was divided by ``S_conf``, so
    ``S_true = S_conf * measured_rms / reference_m_s2``.
    """
    x = np.asarray(samples_m_s2_as_configured, dtype=np.float64)
    if x.ndim != 1:
        raise ValueError(f"samples_m_s2_as_configured.shape={x.shape} must be (n,)")
    if not sample_rate_hz > 0:
        raise ValueError(f"{sample_rate_hz=} must be > 0 Hz")
    if not reference_m_s2 > 0:
        raise ValueError(f"{reference_m_s2=} must be > 0 m/s^2")
    if not 0 < reference_hz < sample_rate_hz / 2:
        raise ValueError(f"{reference_hz=} must be between 0 and half the sample rate "
                         f"({sample_rate_hz / 2:g} Hz)")
    if not configured_mv_per_m_s2 > 0:
        raise ValueError(f"{configured_mv_per_m_s2=} must be > 0 mV/(m/s^2)")
    if not 0 < tolerance < 1:
        raise ValueError(f"{tolerance=} must be between 0 and 1")
    min_frames = int(math.ceil(20 * sample_rate_hz / reference_hz))
    if x.shape[0] < min_frames:
        raise ValueError(f"{x.shape[0]} samples are too few: need at least {min_frames} "
                         f"(20 periods of {reference_hz:g} Hz)")
    if not np.all(np.isfinite(x)):
        raise ValueError("samples_m_s2_as_configured holds non-finite values")

    line_rms, _noise_rms, snr_db, half = _band_rms(x, sample_rate_hz, reference_hz)
    ratio = line_rms / reference_m_s2
    measured = configured_mv_per_m_s2 * ratio
    deviation = (ratio - 1.0) * 100.0
    what = (f"the {reference_hz:g} Hz reference reads {line_rms:.4g} m/s^2 RMS against "
            f"{reference_m_s2:g} m/s^2")
    if not snr_db >= MIN_SNR_DB or ratio < 0.1 or ratio > 10.0:
        verdict = "unreliable"
        text = (f"Unreliable: {what} ({snr_db:.1f} dB over the noise beside it); check that the "
                f"shaker runs, holds this sensor and feeds this channel.")
    elif abs(ratio - 1.0) <= tolerance:
        verdict = "ok"
        text = (f"OK: {what}; the sensitivity is {measured:.4g} mV/(m/s^2), within "
                f"{tolerance * 100:g} % of the {configured_mv_per_m_s2:.4g} in use "
                f"({deviation:+.1f} %).")
    else:
        verdict = "adjust"
        text = (f"Adjust: {what}; the sensitivity is {measured:.4g} mV/(m/s^2), "
                f"{deviation:+.1f} % from the {configured_mv_per_m_s2:.4g} in use. Check the "
                f"sensor's data sheet, cable and mounting, then keep the measured value.")
    return {
        "measured_rms_m_s2": line_rms,
        "measured_mv_per_m_s2": measured,
        "configured_mv_per_m_s2": float(configured_mv_per_m_s2),
        "ratio": ratio,
        "deviation_pct": deviation,
        "snr_db": snr_db,
        "band_hz": [reference_hz - half, reference_hz + half],
        "reference_m_s2": float(reference_m_s2),
        "reference_hz": float(reference_hz),
        "verdict": verdict,
        "text": text,
    }


# --------------------------------------------------------------------------- persistence
def overrides_path(state_dir):
    """``<state_dir>/calibration.json``."""
    return Path(state_dir) / CALIBRATION_FILE


def _load_document(state_dir):
    path = overrides_path(state_dir)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        return {"schema": SCHEMA, "points": {}}
    except OSError as exc:
        raise ConfigError([f"{path}: cannot read: {exc.strerror or exc}"]) from exc
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as exc:
        raise ConfigError([f"{path}: not valid JSON ({exc}); fix or delete it "
                           f"(then calibrate again)"]) from exc
    if not isinstance(doc, dict) or doc.get("schema") != SCHEMA:
        raise ConfigError([f"{path}: not a calibration file of schema {SCHEMA!r}"])
    points = doc.get("points")
    if not isinstance(points, dict):
        raise ConfigError([f"{path}: 'points' must be a table of point names"])
    for name, entry in points.items():
        value = entry.get("sensitivity_mv_per_m_s2") if isinstance(entry, dict) else None
        if isinstance(value, bool) or not isinstance(value, (int, float)) \
                or not math.isfinite(value) or value <= 0:
            raise ConfigError([f"{path}: points.{name}.sensitivity_mv_per_m_s2 = {value!r}: "
                               f"must be a number > 0"])
    return doc


def load_overrides(state_dir):
    """Measured sensitivities kept in the state directory.

    Parameters
    ----------
    state_dir : path
        The agent's state directory.

    Returns
    -------
    dict
        ``{point_name: sensitivity_mv_per_m_s2}``; empty when no file exists.

    Raises
    ------
    agent.errors.ConfigError
        The file exists but cannot be read or is malformed (never silently
        ignored: a wrong calibration misstates every level).
    """
    doc = _load_document(state_dir)
    return {name: float(e["sensitivity_mv_per_m_s2"]) for name, e in doc["points"].items()}


def _write_document(state_dir, doc):
    path = overrides_path(state_dir)
    data = json.dumps(doc, indent=2, sort_keys=True) + "\n"
    try:
        write_text_atomic(path, data)
    except OSError as exc:
        raise ConfigError([f"{path}: cannot write: {exc.strerror or exc}"]) from exc
    return path


def save_override(state_dir, point_name, mv_per_m_s2, details=None):
    """Keep a measured sensitivity for a point (atomic replace of the file).

    Parameters
    ----------
    state_dir : path
        The agent's state directory (created if missing).
    point_name : str
        The point.
    mv_per_m_s2 : float
        Sensitivity to use from now on, mV/(m/s^2).
    details : dict or None
        Extra facts stored beside it (reference, configured value, ...).

    Returns
    -------
    pathlib.Path
        The calibration file.
    """
    if not isinstance(point_name, str) or not point_name:
        raise ValueError(f"{point_name=} must be a point name")
    if isinstance(mv_per_m_s2, bool) or not isinstance(mv_per_m_s2, (int, float)) \
            or not math.isfinite(mv_per_m_s2) or mv_per_m_s2 <= 0:
        raise ValueError(f"{mv_per_m_s2=} must be a sensitivity > 0 in mV/(m/s^2)")
    doc = _load_document(state_dir)
    entry = dict(details or {})
    entry["sensitivity_mv_per_m_s2"] = float(mv_per_m_s2)
    entry["saved_at"] = datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] + "Z"
    doc["points"][point_name] = entry
    return _write_document(state_dir, doc)


def clear_override(state_dir, point_name):
    """Forget a point's measured sensitivity; True if there was one."""
    doc = _load_document(state_dir)
    if point_name not in doc["points"]:
        return False
    del doc["points"][point_name]
    _write_document(state_dir, doc)
    return True


# --------------------------------------------------------------------------- command
def calibrate(config, point_name, reference_m_s2, reference_hz, seconds, save=True, settle_s=0.5):
    """Check a point's sensitivity with a reference shaker on its sensor.

    Parameters
    ----------
    config : agent.config.Config
        Source and points.
    point_name : str
        The point whose sensor is on the shaker.
    reference_m_s2 : float
        Shaker RMS acceleration, m/s^2.
    reference_hz : float
        Shaker frequency, Hz.
    seconds : float
        Signal to analyse, 1 to 60 s (held in memory once: 8 bytes a sample,
        about 25 MB for 60 s at 51.2 kHz; this is a commissioning command, not
        part of the daemon).
    save : bool, default True
        Keep the measured sensitivity in ``<state_dir>/calibration.json``
        when the verdict is "adjust".
    settle_s : float, default 0.5
        Signal dropped first (the AC coupling of a sound card settles).

    Returns
    -------
    dict
        The result of :func:`measure_sensitivity` plus ``point``,
        ``configured_in_file_mv_per_m_s2`` (the config file's value),
        ``source_unit``, ``saved`` and ``path`` (the calibration file).

    Raises
    ------
    ValueError
        Unknown point, bad reference or duration, or a source that already
        delivers m/s^2 (its sensitivity is not ours to correct).
    agent.errors.SourceError
        The source cannot be opened or stops.
    """
    from agent.sources import open_source

    point = config.point(point_name)
    if not 1.0 <= seconds <= 60.0:
        raise ValueError(f"{seconds=} must be between 1 and 60 s")
    if not settle_s >= 0:
        raise ValueError(f"{settle_s=} must be >= 0 s")
    overrides = load_overrides(config.agent.state_dir)
    in_use = effective_sensitivity(point, overrides.get(point.name))
    source = open_source(config)
    rate = source.sample_rate_hz
    n = int(round(seconds * rate))
    record = np.zeros(n, dtype=np.float64)
    block = np.zeros((min(4096, n), source.channels), dtype=np.float64)
    with source:
        if source.unit == "m_s2":
            raise ValueError(f"source.kind = {config.source.kind!r} delivers m/s^2 already "
                             f"(no sensitivity to check)")
        skip = int(round(settle_s * rate))
        while skip > 0:
            k = min(skip, block.shape[0])
            source.read(block[:k])
            skip -= k
        done = 0
        while done < n:
            k = min(n - done, block.shape[0])
            source.read(block[:k])
            record[done:done + k] = block[:k, point.channel]
            done += k
        unit = source.unit
    record *= scale_m_s2_per_unit(point, unit, overrides.get(point.name))
    result = measure_sensitivity(record, rate, reference_m_s2, reference_hz, in_use)
    result.update({"point": point.name, "source_unit": unit,
                   "configured_in_file_mv_per_m_s2": point.sensitivity_mv_per_m_s2,
                   "saved": False, "path": str(overrides_path(config.agent.state_dir))})
    if save and result["verdict"] == "adjust":
        save_override(config.agent.state_dir, point.name, result["measured_mv_per_m_s2"],
                      {"configured_mv_per_m_s2": point.sensitivity_mv_per_m_s2,
                       "reference_m_s2": float(reference_m_s2),
                       "reference_hz": float(reference_hz),
                       "snr_db": round(result["snr_db"], 1)})
        result["saved"] = True
    return result
