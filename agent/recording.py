"""Recording the configured source to a float WAV in m/s^2 (``ballpass record``).

Public API
----------
- :func:`record(config, seconds, out_path, point_name=None)` -> dict.

The recording holds one channel per point (all points in configuration
order, or the one named), each converted to acceleration in m/s^2 with that
point's calibration, including a measured sensitivity kept in the state
directory (:func:`agent.calibration.load_overrides`).  It is written block by
block, so recording an hour takes the same memory as recording a second.  A
float WAV written here can be replayed (``source.kind = "wav"``) or analysed
offline as acceleration.
"""

from __future__ import annotations

import math

import numpy as np

from agent.calibration import load_overrides, scale_m_s2_per_unit

__all__ = ["record", "BLOCK_FRAMES"]

BLOCK_FRAMES = 4096


def record(config, seconds, out_path, point_name=None):
    """Capture ``seconds`` of signal into a float32 WAV of acceleration.

    Parameters
    ----------
    config : agent.config.Config
        Source, points and state directory.
    seconds : float
        Length of the recording, > 0.
    out_path : path
        WAV file to create (overwritten).
    point_name : str or None
        Record only this point; default every point.

    Returns
    -------
    dict
        ``path``, ``frames``, ``seconds``, ``sample_rate_hz``, ``points``
        (names, one WAV channel each, in order), ``source_channels`` (the
        source channel of each), ``scale_m_s2_per_unit`` (per point),
        ``source_unit``, ``overflows`` (source overrun events during the
        recording) and ``source`` (its ``describe()``).

    Raises
    ------
    ValueError
        ``seconds`` is not a positive finite number, or no point has that name.
    agent.errors.SourceError
        The source cannot be opened or stops delivering.
    agent.errors.WavFormatError
        The output file cannot be written.
    """
    from agent.sources import open_source
    from agent.wavio import WavWriter

    if isinstance(seconds, bool) or not isinstance(seconds, (int, float)) \
            or not math.isfinite(seconds) or seconds <= 0:
        raise ValueError(f"{seconds=} must be a positive number of seconds")
    points = (config.point(point_name),) if point_name is not None else tuple(config.points)
    overrides = load_overrides(config.agent.state_dir)
    source = open_source(config)
    rate = source.sample_rate_hz
    frames = int(round(seconds * rate))
    if frames < 1:
        raise ValueError(f"{seconds=} is shorter than one sample at {rate} Hz")
    block = min(BLOCK_FRAMES, frames)
    raw = np.zeros((block, source.channels), dtype=np.float64)
    out = np.zeros((block, len(points)), dtype=np.float64)
    with source:
        scales = [scale_m_s2_per_unit(p, source.unit, overrides.get(p.name)) for p in points]
        overflows_before = source.overflows
        with WavWriter(out_path, rate, channels=len(points), sample_format="float32",
                       block_frames=block) as writer:
            done = 0
            while done < frames:
                k = min(block, frames - done)
                got = source.read(raw[:k])
                for j, (p, scale) in enumerate(zip(points, scales)):
                    np.multiply(raw[:got, p.channel], scale, out=out[:got, j])
                writer.write(out[:got])
                done += got
                if got < k:
                    break
        overflows = source.overflows - overflows_before
        described = source.describe()
        unit = source.unit
    return {
        "path": str(out_path),
        "frames": done,
        "seconds": done / rate,
        "sample_rate_hz": rate,
        "points": [p.name for p in points],
        "source_channels": [p.channel for p in points],
        "scale_m_s2_per_unit": {p.name: s for p, s in zip(points, scales)},
        "source_unit": unit,
        "overflows": overflows,
        "source": described,
    }
