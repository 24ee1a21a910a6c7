"""Offline work on recordings: analyse a WAV file, write a simulated one.

- :func:`analyze_wav`: stream a recording through the point's pipeline.
- :func:`write_simulation`: write a simulated recording of a point's machine.
- :func:`machine_model`: the simulator's model for a point and a fault.

Both stream in fixed blocks: a 600 s recording is never held in memory.
"""

from __future__ import annotations

import numpy as np

from agent.calibration import input_scaling
from agent.errors import UsageError
from agent.pipeline import Pipeline
from agent.simulate import BearingSimulator, MachineModel
from agent.wavio import WavReader, WavWriter

__all__ = ["analyze_wav", "write_simulation", "machine_model", "BLOCK_FRAMES"]

BLOCK_FRAMES = 8192


def _pick_point(config, point_name):
    if point_name is None:
        return config.points[0]
    try:
        return config.point(point_name)
    except ValueError as exc:
        raise UsageError(str(exc)) from None


def analyze_wav(path, config, point_name=None, calibration_mv_per_m_s2=None):
    """Analyse one channel of a WAV recording as one capture.

    Parameters
    ----------
    path : str or Path
        The recording.  A float WAV holds acceleration in m/s²; an integer WAV
        is scaled by the point's calibration (its full scale in m/s²).
    config : Config
    point_name : str, optional
        Point to analyse as (machine, bearing, channel); the first point if
        omitted.  A mono file is read as that point's signal whatever its
        channel number.
    calibration_mv_per_m_s2 : float, optional
        Overrides the configured sensitivity for integer files.

    Returns
    -------
    analysis : Analysis
    info : WavInfo
    """
    point = _pick_point(config, point_name)
    with WavReader(path, block_frames=BLOCK_FRAMES) as reader:
        info = reader.info
        if info.frames == 0:
            raise UsageError(f"{path}: the recording holds no samples")
        channel = 0 if info.channels == 1 else point.channel
        if channel >= info.channels:
            raise UsageError(f"{path}: has {info.channels} channel(s); point {point.name!r} "
                             f"reads channel {point.channel}")
        scale, full_scale = input_scaling(point, "m_s2" if info.is_float else "full_scale",
                                          calibration_mv_per_m_s2)
        try:
            pipe = Pipeline(point, info.sample_rate_hz, max(info.duration_s, 1e-3),
                            full_scale_m_s2=full_scale,
                            lowest_trusted_hz=config.source.lowest_trusted_hz)
        except ValueError as exc:
            raise UsageError(f"{path}: {exc}") from None
        buf = np.empty(BLOCK_FRAMES)
        pipe.start()
        while True:
            n = reader.read_channel_into(buf, channel)
            if n == 0:
                break
            if scale != 1.0:
                buf[:n] *= scale
            pipe.feed(buf[:n])
        return pipe.finish(), info


def machine_model(point, fault="outer", modulation="none", impact_m_s2=None,
                  noise_rms_m_s2=0.5, resonance_hz=3000.0):
    """The simulator's :class:`MachineModel` for a point's machine and bearing.

    ``fault`` is ``"none"``, ``"outer"``, ``"inner"``, ``"rolling"`` or a
    ``+``-joined combination such as ``"outer+inner"``.
    """
    from agent.sources.simulated import fault_set
    faults = fault_set(fault)
    kwargs = {}
    if impact_m_s2 is not None:
        kwargs["impact_m_s2"] = impact_m_s2
    return MachineModel(shaft_hz=point.machine.shaft_hz, orders=point.bearing.orders,
                        faults=faults, modulation=modulation, noise_rms_m_s2=noise_rms_m_s2,
                        resonance_hz=resonance_hz, **kwargs)


def write_simulation(out_path, model, sample_rate_hz, seconds, seed=None):
    """Write ``seconds`` of a simulated machine to a float32 WAV in m/s².

    Returns
    -------
    int
        Frames written.
    """
    sim = BearingSimulator(model, sample_rate_hz, seed=seed)
    total = int(round(seconds * sample_rate_hz))
    buf = np.empty(BLOCK_FRAMES)
    with WavWriter(out_path, sample_rate_hz, channels=1, sample_format="float32") as w:
        done = 0
        while done < total:
            n = min(BLOCK_FRAMES, total - done)
            sim.fill(buf[:n])
            w.write(buf[:n])
            done += n
    return total
