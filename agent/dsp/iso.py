"""Vibration severity zones of ISO 20816-3 (formerly ISO 10816-3).

The standard grades the broadband velocity RMS measured on the bearing housings
of industrial machines above 15 kW into four zones:

- A: newly commissioned machines normally fall here;
- B: acceptable for unrestricted long-term operation;
- C: not suitable for long-term continuous operation; plan an action;
- D: severe enough to cause damage.

Boundaries depend on the machine group (group 1: large machines, 300 kW to
50 MW; group 2: medium machines, 15 kW to 300 kW) and on the support
(``rigid`` or ``flexible``).  Small pumps and fans below 15 kW are commonly
judged against the group 2 values as well.  The measurement band is 10 Hz to
1 kHz, or 2 Hz to 1 kHz for machines running below 600 r/min.
"""

from __future__ import annotations

import math

__all__ = ["ZONE_LIMITS_MM_S", "iso_zone", "zone_limits_mm_s", "velocity_band_hz"]

#: (group, support) -> upper boundaries of zones A, B and C in mm/s RMS.
ZONE_LIMITS_MM_S = {
    (1, "rigid"): (2.3, 4.5, 7.1),
    (1, "flexible"): (3.5, 7.1, 11.0),
    (2, "rigid"): (1.4, 2.8, 4.5),
    (2, "flexible"): (2.3, 4.5, 7.1),
}


def zone_limits_mm_s(group, support):
    """Zone boundaries A/B, B/C and C/D in mm/s RMS.

    Parameters
    ----------
    group : int
        Machine group, 1 or 2.
    support : {"rigid", "flexible"}
        Support class of the machine.

    Returns
    -------
    tuple of float
        ``(ab, bc, cd)`` in mm/s.
    """
    try:
        return ZONE_LIMITS_MM_S[(group, support)]
    except KeyError:
        raise ValueError(f"{group=} must be 1 or 2 and {support=} 'rigid' or 'flexible'") from None


def iso_zone(velocity_rms_mm_s, group=2, support="rigid"):
    """ISO 20816-3 evaluation zone of a broadband velocity RMS.

    Parameters
    ----------
    velocity_rms_mm_s : float
        Velocity RMS in mm/s over the standard band.
    group : int, default 2
    support : {"rigid", "flexible"}, default "rigid"

    Returns
    -------
    str
        ``"A"``, ``"B"``, ``"C"`` or ``"D"``.  A value equal to a boundary
        belongs to the higher zone.

    References
    ----------
    .. [1] ISO 20816-3:2022, Mechanical vibration -- Measurement and
       evaluation of machine vibration -- Part 3: Industrial machines with a
       power rating above 15 kW, Table A.1.
    """
    if not (math.isfinite(velocity_rms_mm_s) and velocity_rms_mm_s >= 0):
        raise ValueError(f"{velocity_rms_mm_s=} must be a finite, non-negative velocity")
    ab, bc, cd = zone_limits_mm_s(group, support)
    if velocity_rms_mm_s < ab:
        return "A"
    if velocity_rms_mm_s < bc:
        return "B"
    if velocity_rms_mm_s < cd:
        return "C"
    return "D"


def velocity_band_hz(nominal_shaft_hz, lowest_trusted_hz=0.0):
    """The frequency band of the broadband velocity RMS.

    Parameters
    ----------
    nominal_shaft_hz : float
        Nominal shaft speed in Hz.
    lowest_trusted_hz : float, default 0.0
        Lowest frequency the input can see (an AC-coupled sound card input
        cuts off below a few Hz to ~20 Hz); the lower edge is raised to it.

    Returns
    -------
    tuple of float
        ``(low_hz, high_hz)``: 10-1000 Hz, or 2-1000 Hz when the machine runs
        below 600 r/min (10 Hz), with the lower edge raised to
        ``lowest_trusted_hz`` when that is higher.
    """
    low_hz = 2.0 if nominal_shaft_hz < 10.0 else 10.0
    return (max(low_hz, float(lowest_trusted_hz)), 1000.0)
