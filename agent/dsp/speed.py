"""Shaft speed from the spectrum.

- :func:`refine_shaft_hz`: the 1x line near the nominal speed, located to a
  fraction of a bin.
"""

from __future__ import annotations

import math

import numpy as np

from agent.dsp.peaks import list_median

__all__ = ["refine_shaft_hz"]


def refine_shaft_hz(psd, df_hz, nominal_hz, search, min_prominence_db=10.0):
    """Locate the 1x line within ``nominal * (1 ± search)``.

    Parameters
    ----------
    psd : ndarray
        One-sided power spectrum of the acceleration (Hann-windowed segments).
    df_hz : float
        Bin spacing in Hz.
    nominal_hz : float
        Nominal shaft speed in Hz (r/min / 60).
    search : float
        Relative half-width of the search window, e.g. 0.05 for ±5 %.  Zero
        keeps the nominal speed.
    min_prominence_db : float, default 10.0
        The line must stand this far above the median of the window's
        neighbourhood; otherwise the nominal speed is kept.

    Returns
    -------
    shaft_hz : float
        Refined speed in Hz.
    source : str
        ``"spectrum"`` or ``"nominal"``.

    Notes
    -----
    The peak bin and its neighbours are fitted with a parabola through the
    logarithms of the power (Gaussian interpolation), which locates a
    Hann-windowed tone to a few hundredths of a bin [1]_.

    References
    ----------
    .. [1] M. Gasior, J. L. Gonzalez, "Improving FFT frequency measurement
       resolution by parabolic and Gaussian spectrum interpolation", AIP
       Conf. Proc. 732 (2004) 276-285.
    """
    if not (nominal_hz > 0 and df_hz > 0):
        raise ValueError(f"{nominal_hz=} and {df_hz=} must be positive")
    if search <= 0:
        return float(nominal_hz), "nominal"
    n = psd.shape[0]
    lo = max(int(math.floor(nominal_hz * (1 - search) / df_hz)), 1)
    hi = min(int(math.ceil(nominal_hz * (1 + search) / df_hz)) + 1, n - 1)
    if hi <= lo:
        return float(nominal_hz), "nominal"
    k = lo + int(np.argmax(psd[lo:hi]))
    ctx_lo = max(int(nominal_hz * 0.5 / df_hz), 1)
    ctx_hi = min(int(nominal_hz * 1.5 / df_hz) + 1, n)
    context = psd[ctx_lo:ctx_hi].tolist()
    floor = list_median(context) if context else 0.0
    if not (psd[k] > 0 and floor > 0) or 10.0 * math.log10(psd[k] / floor) < min_prominence_db:
        return float(nominal_hz), "nominal"
    a, b, c = (math.log(max(psd[k + j], 1e-300)) for j in (-1, 0, 1))
    denom = a - 2.0 * b + c
    offset = 0.5 * (a - c) / denom if denom < 0 else 0.0
    return (k + max(min(offset, 0.5), -0.5)) * df_hz, "spectrum"
