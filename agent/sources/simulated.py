"""Endless simulated vibration, one bearing simulator per measured point.

Public API
----------
- :class:`SimulatedSource` -- the ``simulated`` source; unit ``"m_s2"``.
- :func:`machine_model(point, simulated, impact_m_s2=None)` -> the
  :class:`agent.simulate.MachineModel` of one point.
- :func:`fault_set(fault)` -> frozenset of fault names.

Each point's channel carries the signal of its machine (``point.machine.
shaft_hz``) and bearing (``point.bearing.orders``), with the fault and
modulation of ``[source.simulated]`` unless the point sets its own
(``fault``, ``modulation``).  A channel no point uses stays at zero.  The
impact strength grows linearly with the signal time delivered,
``impact_m_s2 + growth_m_s2_per_hour * t_h``, so a demo walks a defect from
"normal" to "act".  With ``source.realtime = true`` reads are paced to real
time (:class:`agent.sources.wav.Pacer`); otherwise they return at once.
"""

from __future__ import annotations

import time

from agent.sources import BaseSource
from agent.sources.wav import Pacer

__all__ = ["SimulatedSource", "machine_model", "fault_set"]


def fault_set(fault):
    """Fault names for the simulator from a config ``fault`` value.

    Parameters
    ----------
    fault : str
        ``"none"``, ``"outer"``, ``"inner"``, ``"rolling"`` or
        ``"outer+inner"``.

    Returns
    -------
    frozenset of str
    """
    if fault not in ("none", "outer", "inner", "rolling", "outer+inner"):
        raise ValueError(f"{fault=} must be one of none, outer, inner, rolling, outer+inner")
    return frozenset() if fault == "none" else frozenset(fault.split("+"))


def machine_model(point, simulated, impact_m_s2=None):
    """The simulator's model of one point.

    Parameters
    ----------
    point : agent.config.PointSettings
        Machine speed, bearing orders and optional fault/modulation override.
    simulated : agent.config.SimulatedSettings
        Source-level fault, modulation, impact, noise and resonance.
    impact_m_s2 : float or None
        Impact peak to use instead of ``simulated.impact_m_s2``.

    Returns
    -------
    agent.simulate.MachineModel
    """
    from agent.simulate import MachineModel

    fault = point.fault if point.fault is not None else simulated.fault
    modulation = point.modulation if point.modulation is not None else simulated.modulation
    return MachineModel(
        shaft_hz=point.machine.shaft_hz,
        orders=point.bearing.orders,
        faults=fault_set(fault),
        modulation=modulation,
        impact_m_s2=simulated.impact_m_s2 if impact_m_s2 is None else impact_m_s2,
        resonance_hz=simulated.resonance_hz,
        noise_rms_m_s2=simulated.noise_rms_m_s2,
    )


class SimulatedSource(BaseSource):
    """Simulated acceleration for every configured point.

    Parameters
    ----------
    config : agent.config.Config
        Uses ``source.sample_rate_hz``, ``channels``, ``realtime``,
        ``simulated`` and the points.
    clock, wait : callable, optional
        Passed to :class:`~agent.sources.wav.Pacer` (tests inject a clock).

    Notes
    -----
    Point ``i`` is seeded with ``simulated.seed + i`` when a seed is set, so a
    seeded run is repeatable and the channels are not copies of each other.
    The simulators write straight into the caller's array columns; nothing is
    allocated per read.
    """

    kind = "simulated"

    def __init__(self, config, clock=time.monotonic, wait=None):
        super().__init__()
        src = config.source
        self.sample_rate_hz = int(src.sample_rate_hz)
        self.channels = int(src.channels)
        self.realtime = bool(src.realtime)
        self.unit = "m_s2"
        self.settings = src.simulated
        self.points = tuple(config.points)
        self._pacer = Pacer(self.sample_rate_hz, clock=clock, wait=wait)
        self._sims = ()
        self._idle_channels = ()
        self._t_open = None
        self.frames_delivered = 0

    @property
    def elapsed_s(self):
        """Time the defect has grown for: wall-clock since opening when paced
        in real time, else the signal time delivered."""
        if self.realtime and self._t_open is not None:
            return max(0.0, self._pacer.now() - self._t_open)
        return self.frames_delivered / self.sample_rate_hz

    @property
    def impact_m_s2(self):
        """Current impact peak of a faulty point, m/s^2 (grows with time)."""
        hours = self.elapsed_s / 3600.0
        return self.settings.impact_m_s2 + self.settings.growth_m_s2_per_hour * hours

    def _open(self):
        from agent.simulate import BearingSimulator

        seed = self.settings.seed
        sims = []
        for i, p in enumerate(self.points):
            if any(c == p.channel for c, _ in sims):
                continue  # two points on one channel share the first one's signal
            sims.append((p.channel, BearingSimulator(machine_model(p, self.settings),
                                                     self.sample_rate_hz,
                                                     seed=None if seed is None else seed + i)))
        self._sims = tuple(sims)
        self._idle_channels = tuple(c for c in range(self.channels)
                                    if all(c != used for used, _ in sims))
        self.frames_delivered = 0
        self._pacer.start()
        self._t_open = self._pacer.now()

    def _close(self):
        self._pacer.stop()
        self._sims = ()

    def _read(self, out):
        n = out.shape[0]
        if self.settings.growth_m_s2_per_hour > 0:
            impact = self.impact_m_s2
            for _, sim in self._sims:
                sim.set_impact(impact)
        for channel, sim in self._sims:
            sim.fill(out[:, channel])
        for c in self._idle_channels:
            out[:, c] = 0.0
        if self.realtime:
            self._pacer.advance(n)
        self.frames_delivered += n
        return n

    def discard(self):
        """Restart the real-time pacing from now (the simulated machine runs
        on; its signal is generated on demand); returns 0."""
        if self._is_open:
            self._pacer.start()
        return 0

    def describe(self):
        """Fault settings, pacing mode and the current impact peak."""
        d = super().describe()
        d.update({"realtime": self.realtime, "fault": self.settings.fault,
                  "modulation": self.settings.modulation,
                  "impact_m_s2": round(self.impact_m_s2, 6),
                  "growth_m_s2_per_hour": self.settings.growth_m_s2_per_hour,
                  "points": {p.name: {"channel": p.channel,
                                      "fault": p.fault or self.settings.fault,
                                      "modulation": p.modulation or self.settings.modulation}
                             for p in self.points}})
        return d
