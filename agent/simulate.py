"""A streaming, physically plausible bearing-vibration simulator.

Produces acceleration in m/s^2 (float64) at a mounting point near a rolling
bearing: shaft 1x and 2x components, broadband noise, and for each bearing
fault a train of impacts that ring the machine's structural resonance.

Public API
----------
- :class:`MachineModel` -- frozen description of the machine and its faults.
- :class:`BearingSimulator` -- ``fill(out)`` writes the next ``len(out)``
  samples; continuous across calls, fixed memory; ``set_impact`` and
  ``set_model`` change the machine while it runs.
- :func:`simulate` -- a whole recording as one array (tests, ``simulate``
  command).
- ``FAULTS``, ``MODULATIONS`` -- the allowed fault and modulation names.

Physics
-------
Each time a rolling element strikes a defect the structure rings at
``resonance_hz`` with damping ratio ``damping_ratio``; the impulse response is
``exp(-zeta*w*t) * sin(w_d*t)`` with ``w = 2*pi*resonance_hz`` and
``w_d = w*sqrt(1 - zeta**2)``, scaled so that its peak is ``impact_m_s2`` and
truncated once its envelope has decayed below 1e-4.  Impacts repeat at the
defect rate (BPFO, BPFI, or 2xBSF for a rolling element that strikes both
races) with a random spacing of relative standard deviation ``jitter`` (the
rolling elements slip).  A varying load modulates the impact strength:

============  ======================  ======================  ====================
modulation    outer race (BPFO)       inner race (BPFI)       rolling element
============  ======================  ======================  ====================
none          even                    even                    even
unbalance     1x (rotating load)      even                    FTF (load zone)
gravity       even                    1x (defect passes zone) FTF (load zone)
both          1x                      1x                      FTF (load zone)
============  ======================  ======================  ====================

A rotating load (unbalance) turns with the inner race, so an inner-race
defect always meets it at the same angle while a fixed outer-race defect
meets it once per turn; a stationary load (gravity, the load zone) is the
reverse.  A rolling-element defect is carried through the load zone by the
cage once per cage turn.  The strength factor is
``1 - depth/2 + depth/2*cos(angle)``: ``impact_m_s2`` at the strongest point,
``impact_m_s2*(1 - depth)`` at the weakest.

References
----------
.. [1] P. D. McFadden, J. D. Smith, "Model for the vibration produced by a
   single point defect in a rolling element bearing", J. Sound Vib. 96
   (1984) 69-82.
.. [2] R. B. Randall, J. Antoni, "Rolling element bearing diagnostics -- A
   tutorial", Mech. Syst. Signal Process. 25 (2011) 485-520, sec. 2.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from agent.dsp.bearing import DefectOrders

__all__ = ["FAULTS", "MODULATIONS", "MachineModel", "BearingSimulator", "simulate"]

FAULTS = ("outer", "inner", "rolling")
MODULATIONS = ("none", "unbalance", "gravity", "both")

_RING_FLOOR = 1e-4          # truncate the ring-down below this fraction of its start
_FRAME_SAMPLES = 8192       # default generation grid
_WANDER_PERIOD_S = 30.0     # period of the slow speed variation
_JITTER_CLIP = 3.0          # spacing jitter is clipped at +-3 standard deviations
_ONE_X_UNBALANCE_M_S2 = 1.0
_ONE_X_BALANCED_M_S2 = 0.2


def _check_range(name, value, low, high, low_open=False, high_open=False):
    """Raise ValueError unless ``value`` is a finite real number in the range."""
    ok = (isinstance(value, (int, float, np.integer, np.floating))
          and not isinstance(value, bool) and math.isfinite(value))
    if ok:
        ok = (value > low if low_open else value >= low) and \
             (high is None or (value < high if high_open else value <= high))
    if not ok:
        left = "(" if low_open else "["
        right = "inf)" if high is None else (f"{high})" if high_open else f"{high}]")
        raise ValueError(f"{name}={value!r} must be a finite number in {left}{low}, {right}")


@dataclass(frozen=True)
class MachineModel:
    """A machine with a rolling bearing, as the simulator sees it.

    Parameters
    ----------
    shaft_hz : float
        Nominal shaft rotation frequency in Hz.
    orders : agent.dsp.bearing.DefectOrders
        Defect orders of the bearing.
    faults : frozenset of str, default empty
        Subset of ``{"outer", "inner", "rolling"}``; empty for a healthy
        bearing.  Any iterable of names is accepted and stored as a frozenset.
    modulation : str, default "none"
        Load that modulates the impact strength: ``"none"``, ``"unbalance"``
        (rotating), ``"gravity"`` (stationary) or ``"both"``.
    impact_m_s2 : float, default 3.0
        Peak acceleration of one ringing impact at full strength, m/s^2.  The
        default gives a clear line in the envelope spectrum while raising the
        overall RMS only slightly (an early-stage defect).
    modulation_depth : float, default 0.6
        Fraction by which the impact strength drops at the weakest point of
        the load modulation, 0..1.
    resonance_hz : float, default 3000.0
        Structural resonance excited by the impacts, Hz.
    damping_ratio : float, default 0.07
        Damping ratio zeta of that resonance, 0.005..0.5.
    jitter : float, default 0.015
        Relative standard deviation of the spacing between impacts (slip),
        0..0.1.
    one_x_m_s2 : float, optional
        Amplitude of the shaft 1x component, m/s^2.  Default 1.0 when the
        modulation includes unbalance, else 0.2.
    two_x_m_s2 : float, default 0.1
        Amplitude of the 2x component, m/s^2.
    noise_rms_m_s2 : float, default 0.5
        RMS of the broadband Gaussian noise over the whole band, m/s^2.
    speed_wander : float, default 0.0
        Relative amplitude of a slow sinusoidal speed variation (period
        30 s), 0..0.2.

    Raises
    ------
    ValueError
        A field is out of range; the message names it and its value.
    """

    shaft_hz: float
    orders: DefectOrders
    faults: frozenset = frozenset()
    modulation: str = "none"
    impact_m_s2: float = 3.0
    modulation_depth: float = 0.6
    resonance_hz: float = 3000.0
    damping_ratio: float = 0.07
    jitter: float = 0.015
    one_x_m_s2: float | None = None
    two_x_m_s2: float = 0.1
    noise_rms_m_s2: float = 0.5
    speed_wander: float = 0.0

    def __post_init__(self):
        _check_range("shaft_hz", self.shaft_hz, 0.0, None, low_open=True)
        if not isinstance(self.orders, DefectOrders):
            raise ValueError(f"orders={self.orders!r} must be an agent.dsp.bearing.DefectOrders")
        faults = self.faults
        if isinstance(faults, str) or not hasattr(faults, "__iter__"):
            raise ValueError(f"faults={faults!r} must be a set of names from {FAULTS}")
        faults = frozenset(faults)
        unknown = sorted(str(f) for f in faults if f not in FAULTS)
        if unknown:
            raise ValueError(f"faults={sorted(map(str, faults))} has unknown names {unknown}; "
                             f"allowed: {', '.join(FAULTS)}")
        object.__setattr__(self, "faults", faults)
        if self.modulation not in MODULATIONS:
            raise ValueError(f"modulation={self.modulation!r} must be one of {', '.join(MODULATIONS)}")
        _check_range("impact_m_s2", self.impact_m_s2, 0.0, None)
        _check_range("modulation_depth", self.modulation_depth, 0.0, 1.0)
        _check_range("resonance_hz", self.resonance_hz, 0.0, None, low_open=True)
        _check_range("damping_ratio", self.damping_ratio, 0.005, 0.5)
        _check_range("jitter", self.jitter, 0.0, 0.1)
        if self.one_x_m_s2 is None:
            unbalanced = self.modulation in ("unbalance", "both")
            object.__setattr__(self, "one_x_m_s2",
                               _ONE_X_UNBALANCE_M_S2 if unbalanced else _ONE_X_BALANCED_M_S2)
        _check_range("one_x_m_s2", self.one_x_m_s2, 0.0, None)
        _check_range("two_x_m_s2", self.two_x_m_s2, 0.0, None)
        _check_range("noise_rms_m_s2", self.noise_rms_m_s2, 0.0, None)
        _check_range("speed_wander", self.speed_wander, 0.0, 0.2)

    def defect_rates_hz(self):
        """Impact repetition rate of each fault at the nominal speed.

        Returns
        -------
        dict
            ``{"outer": BPFO, "inner": BPFI, "rolling": 2*BSF}`` in Hz.
        """
        o = self.orders
        return {"outer": o.bpfo * self.shaft_hz,
                "inner": o.bpfi * self.shaft_hz,
                "rolling": 2.0 * o.bsf * self.shaft_hz}


class BearingSimulator:
    """Generate a machine's vibration block by block, in fixed memory.

    Parameters
    ----------
    model : MachineModel
        The machine.
    sample_rate_hz : float
        Output sample rate; ``model.resonance_hz`` must lie below its Nyquist
        frequency.
    seed : int or None, default None
        Seed of every random choice (phases, impact spacing, noise); the same
        seed gives the same signal however ``fill`` calls cut it.
    frame_samples : int, default 8192
        Internal generation grid (raised to the ring-down length if shorter).

    Attributes
    ----------
    model : MachineModel
        The current model (``set_impact`` and ``set_model`` replace it).
    sample_rate_hz : float
    samples_delivered : int
        Samples written by ``fill`` so far.

    Notes
    -----
    The signal is generated in frames of ``frame_samples`` on a fixed grid of
    absolute sample indices, into a work buffer that is one ring-down longer
    than a frame: impacts near the end of a frame ring on into the overlap,
    which becomes the start of the next frame.  ``fill`` copies out of the
    current frame, so the output does not depend on how the caller cuts it
    (bit-exact), and memory is fixed at construction.  The phase of the shaft
    is computed from the absolute sample index, and impacts are scheduled in
    shaft revolutions, placed with sub-sample accuracy by mixing a sine and a
    cosine ring-down kernel.  ``set_impact``/``set_model`` take effect from the
    next frame that has not been generated yet (at most one frame later).
    """

    def __init__(self, model, sample_rate_hz, seed=None, frame_samples=_FRAME_SAMPLES):
        if not isinstance(model, MachineModel):
            raise ValueError(f"model={model!r} must be a MachineModel")
        _check_range("sample_rate_hz", sample_rate_hz, 0.0, None, low_open=True)
        if isinstance(frame_samples, bool) or not isinstance(frame_samples, int) or frame_samples < 1:
            raise ValueError(f"{frame_samples=} must be a positive whole number of samples")
        self.sample_rate_hz = float(sample_rate_hz)
        self._check_nyquist(model)
        seq = np.random.SeedSequence(seed)
        phase_seq, noise_seq, *fault_seqs = seq.spawn(2 + len(FAULTS))
        phases = np.random.Generator(np.random.PCG64(phase_seq)).uniform(0.0, 2.0 * math.pi, 6)
        (self._phase_1x, self._phase_2x, self._phase_rotating, self._phase_stationary,
         self._phase_cage, self._wander_phase) = (float(p) for p in phases)
        self._noise_rng = np.random.Generator(np.random.PCG64(noise_seq))
        self._fault_rngs = {f: np.random.Generator(np.random.PCG64(s))
                            for f, s in zip(FAULTS, fault_seqs)}
        self._frame_request = frame_samples
        self._frame = 0
        self._work = np.zeros(0)
        self._next_n = 0           # absolute index of the first sample of the next frame
        self._read_pos = 0         # read position in the current frame
        self._shift_pending = False
        self._base_n = 0           # speed profile: rev(n) is anchored at (base_n, base_rev)
        self._base_rev = 0.0
        self._next_rev = {}        # fault -> shaft revolution of its next impact
        self.samples_delivered = 0
        self.model = model
        self._install(model)
        self._read_pos = self._frame  # nothing generated yet

    # -- public -----------------------------------------------------------

    def fill(self, out):
        """Write the next ``len(out)`` samples into ``out``.

        Parameters
        ----------
        out : numpy.ndarray of float64, shape (n,)
            Destination, acceleration in m/s^2.

        Returns
        -------
        int
            ``n``.
        """
        if not isinstance(out, np.ndarray) or out.dtype != np.float64 or out.ndim != 1:
            raise ValueError("out must be a one-dimensional float64 numpy array")
        n = out.shape[0]
        written = 0
        frame = self._frame
        while written < n:
            if self._read_pos >= frame:
                self._generate_frame()
                self._read_pos = 0
            k = min(n - written, frame - self._read_pos)
            out[written:written + k] = self._work[self._read_pos:self._read_pos + k]
            self._read_pos += k
            written += k
        self.samples_delivered += n
        return n

    def set_impact(self, impact_m_s2):
        """Change the impact strength (e.g. to grow a defect during a demo).

        Parameters
        ----------
        impact_m_s2 : float
            New peak of one ringing impact at full strength, m/s^2.
        """
        _check_range("impact_m_s2", impact_m_s2, 0.0, None)
        self.model = dataclasses.replace(self.model, impact_m_s2=float(impact_m_s2))

    def set_model(self, model):
        """Replace the machine model while running.

        Shaft phase and the pending impacts carry over; a new fault starts at
        a random point of its first period.  The work buffer is reallocated
        only when the new ring-down is longer than the current frame.

        Parameters
        ----------
        model : MachineModel
        """
        if not isinstance(model, MachineModel):
            raise ValueError(f"model={model!r} must be a MachineModel")
        self._check_nyquist(model)
        # re-anchor the speed profile at the next frame under the old model
        old = self.model
        tau = (self._next_n - self._base_n) / self.sample_rate_hz
        self._base_rev = self._rev_at(tau, old)
        self._wander_phase = (self._wander_phase + 2.0 * math.pi * tau / _WANDER_PERIOD_S) \
            % (2.0 * math.pi)
        self._base_n = self._next_n
        self.model = model
        self._install(model)

    # -- internals --------------------------------------------------------

    def _check_nyquist(self, model):
        nyquist_hz = self.sample_rate_hz / 2.0
        if not model.resonance_hz < nyquist_hz:
            raise ValueError(
                f"resonance_hz={model.resonance_hz} must be below the Nyquist frequency "
                f"{nyquist_hz} Hz of sample_rate_hz={self.sample_rate_hz}")

    def _install(self, model):
        """Kernels, buffers and fault schedule for ``model``."""
        fs = self.sample_rate_hz
        zeta = model.damping_ratio
        w = 2.0 * math.pi * model.resonance_hz
        wd = w * math.sqrt(1.0 - zeta * zeta)
        decay = zeta * w / fs                 # per sample
        turn = wd / fs                        # radians per sample
        length = int(math.ceil(math.log(1.0 / _RING_FLOOR) / decay)) + 1
        # peak of exp(-zeta w t) sin(wd t): at wd t = atan(sqrt(1-zeta^2)/zeta)
        t_peak = math.atan2(math.sqrt(1.0 - zeta * zeta), zeta) / wd
        peak = math.exp(-zeta * w * t_peak) * math.sin(wd * t_peak)
        k = np.arange(length, dtype=np.float64)
        env = np.exp(-decay * k) / peak
        self._ring_sin = env * np.sin(turn * k)
        self._ring_cos = env * np.cos(turn * k)
        self._ring_scratch = np.zeros(length)
        self._ring_len = length
        self._decay, self._turn = decay, turn
        frame = max(self._frame_request, length)
        if frame > self._frame or self._work.shape[0] < frame + length:
            self._resize(max(frame, self._frame), length)
        # fault schedule: keep pending impacts, start new faults at random
        for fault in FAULTS:
            if fault not in model.faults:
                self._next_rev.pop(fault, None)
            elif fault not in self._next_rev:
                start_rev = self._rev_at((self._next_n - self._base_n) / fs, model)
                period_rev = 1.0 / self._order_of(fault, model)
                self._next_rev[fault] = start_rev + period_rev * self._fault_rngs[fault].uniform()

    def _resize(self, frame, length):
        """(Re)allocate the work buffers, keeping ring-down tails and unread samples."""
        old_work, old_frame = self._work, self._frame
        work = np.zeros(frame + length)
        if old_frame:
            unread = old_frame - self._read_pos
            pending = old_work[old_frame:]        # tails beyond the current frame
            if self._shift_pending:
                # current frame still being read: move it so it ends at the new frame end
                work[frame - unread:frame] = old_work[self._read_pos:old_frame]
                work[frame:frame + pending.shape[0]] = pending
                self._read_pos = frame - unread
            else:
                work[:old_work.shape[0]] = old_work
        self._work = work
        self._frame = frame
        self._index = np.arange(frame, dtype=np.float64)
        self._tau = np.zeros(frame)
        self._rev = np.zeros(frame)
        self._tmp = np.zeros(frame)

    @staticmethod
    def _order_of(fault, model):
        o = model.orders
        return {"outer": o.bpfo, "inner": o.bpfi, "rolling": 2.0 * o.bsf}[fault]

    def _rev_at(self, tau_s, model):
        """Shaft revolutions at ``tau_s`` seconds after the anchor."""
        rev = tau_s
        if model.speed_wander:
            amp_s = model.speed_wander * _WANDER_PERIOD_S / (2.0 * math.pi)
            rev += amp_s * (math.cos(self._wander_phase)
                            - math.cos(self._wander_phase + 2.0 * math.pi * tau_s / _WANDER_PERIOD_S))
        return self._base_rev + model.shaft_hz * rev

    def _sample_of_rev(self, rev, model):
        """Fractional absolute sample index at which the shaft reaches ``rev``."""
        target = (rev - self._base_rev) / model.shaft_hz   # seconds of nominal speed
        tau = target
        if model.speed_wander:
            w = model.speed_wander
            amp_s = w * _WANDER_PERIOD_S / (2.0 * math.pi)
            omega = 2.0 * math.pi / _WANDER_PERIOD_S
            phi = self._wander_phase
            for _ in range(8):   # Newton: tau + amp(cos phi - cos(phi + omega tau)) = target
                g = tau + amp_s * (math.cos(phi) - math.cos(phi + omega * tau)) - target
                step = g / (1.0 + w * math.sin(phi + omega * tau))
                tau -= step
                if abs(step) < 1e-13 * (1.0 + abs(tau)):
                    break
        return self._base_n + tau * self.sample_rate_hz

    def _generate_frame(self):
        model = self.model
        frame = self._frame
        work = self._work
        if self._shift_pending:
            tail = work.shape[0] - frame
            work[:tail] = work[frame:]
            work[tail:] = 0.0
        self._shift_pending = True
        start = self._next_n
        fs = self.sample_rate_hz
        out = work[:frame]
        tau, rev, tmp = self._tau, self._rev, self._tmp
        np.add(self._index, float(start - self._base_n), out=tau)
        tau /= fs
        if model.speed_wander:
            amp_s = model.speed_wander * _WANDER_PERIOD_S / (2.0 * math.pi)
            np.multiply(tau, 2.0 * math.pi / _WANDER_PERIOD_S, out=rev)
            rev += self._wander_phase
            np.cos(rev, out=rev)
            np.subtract(math.cos(self._wander_phase), rev, out=rev)
            rev *= amp_s
            rev += tau
        else:
            rev[:] = tau
        rev *= model.shaft_hz
        rev += self._base_rev
        for harmonic, amp, phase in ((1, model.one_x_m_s2, self._phase_1x),
                                     (2, model.two_x_m_s2, self._phase_2x)):
            if amp:
                np.multiply(rev, 2.0 * math.pi * harmonic, out=tmp)
                tmp += phase
                np.sin(tmp, out=tmp)
                tmp *= amp
                out += tmp
        # always draw, so the noise stays aligned to the sample index
        self._noise_rng.standard_normal(out=tmp)
        if model.noise_rms_m_s2:
            tmp *= model.noise_rms_m_s2
            out += tmp
        end = start + frame
        for fault in FAULTS:
            if fault in self._next_rev:
                self._add_impacts(fault, model, start, end)
        self._next_n = end

    def _strength(self, fault, model, rev):
        """Impact strength factor at shaft revolution ``rev`` (1 = full)."""
        mod = model.modulation
        if fault == "outer" and mod in ("unbalance", "both"):
            angle = 2.0 * math.pi * rev + self._phase_rotating
        elif fault == "inner" and mod in ("gravity", "both"):
            angle = 2.0 * math.pi * rev + self._phase_stationary
        elif fault == "rolling" and mod != "none":
            angle = 2.0 * math.pi * model.orders.ftf * rev + self._phase_cage
        else:
            return 1.0
        depth = model.modulation_depth
        return 1.0 - 0.5 * depth + 0.5 * depth * math.cos(angle)

    def _add_impacts(self, fault, model, start, end):
        """Add every impact of ``fault`` whose first sample falls in [start, end)."""
        rng = self._fault_rngs[fault]
        period_rev = 1.0 / self._order_of(fault, model)
        jitter = model.jitter
        work, scratch = self._work, self._ring_scratch
        ring_sin, ring_cos, length = self._ring_sin, self._ring_cos, self._ring_len
        decay, turn = self._decay, self._turn
        rev = self._next_rev[fault]
        while True:
            position = self._sample_of_rev(rev, model)
            first = math.ceil(position)
            if first >= end:
                break
            first = max(first, start)
            lag = first - position          # 0 <= lag < 1 sample after the impact
            amp = model.impact_m_s2 * self._strength(fault, model, rev) * math.exp(-decay * lag)
            if amp:
                j = first - start
                seg = work[j:j + length]
                np.multiply(ring_sin, amp * math.cos(turn * lag), out=scratch)
                seg += scratch
                np.multiply(ring_cos, amp * math.sin(turn * lag), out=scratch)
                seg += scratch
            spread = min(max(rng.standard_normal(), -_JITTER_CLIP), _JITTER_CLIP)
            rev += period_rev * (1.0 + jitter * spread)
        self._next_rev[fault] = rev


def simulate(model, sample_rate_hz, seconds, seed=None):
    """A whole simulated recording as one array.

    Parameters
    ----------
    model : MachineModel
        The machine.
    sample_rate_hz : float
        Sample rate, Hz.
    seconds : float
        Duration; ``round(seconds * sample_rate_hz)`` samples are returned.
    seed : int or None, default None
        Seed of the random choices.

    Returns
    -------
    numpy.ndarray of float64
        Acceleration in m/s^2.
    """
    _check_range("seconds", seconds, 0.0, None, low_open=True)
    simulator = BearingSimulator(model, sample_rate_hz, seed=seed)
    out = np.empty(int(round(seconds * simulator.sample_rate_hz)))
    simulator.fill(out)
    return out
