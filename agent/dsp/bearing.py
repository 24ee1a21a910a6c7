"""Rolling-element bearing defect frequencies.

All frequencies are returned as *orders* (multiples of the shaft rotation
frequency) by :func:`defect_orders`, and in hertz by :func:`defect_frequencies_hz`.

Convention for the rolling element: ``bsf`` is the ball *spin* frequency, the
rate at which a ball turns about its own axis.  A defect on a ball strikes the
inner and the outer race once each per spin, so the repetition rate seen in
the envelope spectrum is ``2 * bsf``; it is modulated at the cage rate ``ftf``
as the ball carries the defect through the load zone.  Every report of this
package labels the number it prints: ``BSF`` for the spin rate, ``2xBSF`` for
the defect rate.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = ["DefectOrders", "defect_orders", "defect_frequencies_hz"]


@dataclass(frozen=True)
class DefectOrders:
    """Bearing defect frequencies as multiples of the shaft speed (orders).

    Attributes
    ----------
    bpfo : float
        Ball pass frequency, outer race.
    bpfi : float
        Ball pass frequency, inner race.
    bsf : float
        Ball spin frequency (one turn of a ball about its axis); the
        rolling-element defect rate is ``2 * bsf``.
    ftf : float
        Fundamental train (cage) frequency.
    """

    bpfo: float
    bpfi: float
    bsf: float
    ftf: float

    def __post_init__(self):
        for name in ("bpfo", "bpfi", "bsf", "ftf"):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
                raise ValueError(f"{name}={value!r} must be a positive finite order")


def defect_orders(balls, ball_diameter_mm, pitch_diameter_mm, contact_angle_deg=0.0):
    """Defect orders of a rolling-element bearing from its geometry.

    Parameters
    ----------
    balls : int
        Number of rolling elements in one row, ``n``.
    ball_diameter_mm : float
        Rolling-element diameter ``d`` in mm.
    pitch_diameter_mm : float
        Pitch (cage) diameter ``D`` in mm, the diameter of the circle through
        the ball centres.
    contact_angle_deg : float, default 0.0
        Contact angle ``phi`` in degrees (0 for a deep-groove ball bearing
        under radial load).

    Returns
    -------
    DefectOrders
        Orders (multiples of the shaft speed), for a rotating inner race and a
        stationary outer race.

    Notes
    -----
    With ``r = (d / D) cos(phi)``::

        FTF  = (1 - r) / 2
        BPFO = n (1 - r) / 2
        BPFI = n (1 + r) / 2
        BSF  = D / (2 d) (1 - r**2)

    so that ``BPFO + BPFI = n`` and ``BPFO = n * FTF`` exactly.

    References
    ----------
    .. [1] T. A. Harris, M. N. Kotzalas, "Rolling Bearing Analysis", 5th ed.,
       CRC Press, 2006 (kinematics of rolling bearings).
    .. [2] R. B. Randall, J. Antoni, "Rolling element bearing diagnostics --
       A tutorial", Mech. Syst. Signal Process. 25 (2011) 485-520, eq. (1)-(4).

    Examples
    --------
    >>> o = defect_orders(9, 7.94, 39.04)
    >>> round(o.bpfo, 4), round(o.bpfi, 4), round(2 * o.bsf, 4), round(o.ftf, 4)
    (3.5848, 5.4152, 4.7135, 0.3983)
    """
    if isinstance(balls, bool) or not isinstance(balls, int) or balls < 3:
        raise ValueError(f"{balls=} must be a whole number of rolling elements, 3 or more")
    for name, value in (("ball_diameter_mm", ball_diameter_mm),
                        ("pitch_diameter_mm", pitch_diameter_mm)):
        if not (math.isfinite(value) and value > 0):
            raise ValueError(f"{name}={value!r} must be a positive length in mm")
    if not ball_diameter_mm < pitch_diameter_mm:
        raise ValueError(
            f"ball_diameter_mm={ball_diameter_mm} must be smaller than "
            f"pitch_diameter_mm={pitch_diameter_mm}")
    if not (math.isfinite(contact_angle_deg) and 0.0 <= contact_angle_deg < 90.0):
        raise ValueError(f"{contact_angle_deg=} must be in [0, 90) degrees")
    r = ball_diameter_mm / pitch_diameter_mm * math.cos(math.radians(contact_angle_deg))
    return DefectOrders(
        bpfo=balls * (1.0 - r) / 2.0,
        bpfi=balls * (1.0 + r) / 2.0,
        bsf=pitch_diameter_mm / (2.0 * ball_diameter_mm) * (1.0 - r * r),
        ftf=(1.0 - r) / 2.0,
    )


def defect_frequencies_hz(orders, shaft_hz):
    """Defect frequencies in Hz for a shaft speed.

    Parameters
    ----------
    orders : DefectOrders
        Orders from :func:`defect_orders` or entered directly.
    shaft_hz : float
        Shaft rotation frequency in Hz (r/min / 60).

    Returns
    -------
    dict
        ``{"bpfo", "bpfi", "bsf", "bsf2", "ftf"}`` in Hz, where ``bsf2`` is
        the rolling-element defect rate ``2 * bsf``.
    """
    if not (math.isfinite(shaft_hz) and shaft_hz > 0):
        raise ValueError(f"{shaft_hz=} must be a positive frequency in Hz")
    return {
        "bpfo": orders.bpfo * shaft_hz,
        "bpfi": orders.bpfi * shaft_hz,
        "bsf": orders.bsf * shaft_hz,
        "bsf2": 2.0 * orders.bsf * shaft_hz,
        "ftf": orders.ftf * shaft_hz,
    }
