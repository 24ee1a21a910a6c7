"""Peaks in averaged spectra: interpolated peak search, local noise floor, SNR, sidebands.

- :func:`find_peak`: the largest bin within ``target ± tolerance``, refined by
  parabolic interpolation.
- :func:`noise_floor`: the median of the bins around a frequency, the peak
  and its immediate neighbours left out.
- :func:`snr_db`: a peak over the local floor in dB (amplitude ratio).
- :func:`sideband_ratio`: the modulation sidebands relative to their carrier.
- :func:`list_median`: the median of a short list of floats.

All functions take an amplitude spectrum ``amp`` on bins ``k * df_hz``, as
an array or as a list of floats.  They read a few bins at a time and work on
those as Python floats (:func:`bin_floats`), several times cheaper than numpy
calls on a handful of values, without ever copying the whole spectrum.
"""

from __future__ import annotations

import math

__all__ = ["Peak", "find_peak", "noise_floor", "snr_db", "sideband_ratio", "list_median", "bin_floats"]


class Peak(tuple):
    """``(freq_hz, amplitude, bin)`` of a found peak."""

    __slots__ = ()

    def __new__(cls, freq_hz, amplitude, bin_):
        return super().__new__(cls, (freq_hz, amplitude, bin_))

    freq_hz = property(lambda self: self[0])
    amplitude = property(lambda self: self[1])
    bin = property(lambda self: self[2])


def bin_floats(amp, lo, hi):
    """Bins ``lo:hi`` of ``amp`` as a list of Python floats."""
    part = amp[lo:hi]
    return part if isinstance(part, list) else part.tolist()


def list_median(values):
    """Median of a list of floats, as ``numpy.median`` gives it.

    For the few dozen bins of a local floor, sorting a Python list is several
    times cheaper than numpy's median.  The list is sorted in place.

    Parameters
    ----------
    values : list of float
        At least one value.

    Returns
    -------
    float
        The middle value, or the mean of the two middle values.
    """
    values.sort()
    k = len(values) // 2
    return values[k] if len(values) % 2 else 0.5 * (values[k - 1] + values[k])


def _window_bins(target_hz, tol_hz, df_hz, n, min_half_bins=1.5):
    half = max(tol_hz, min_half_bins * df_hz)
    lo = max(int(math.floor((target_hz - half) / df_hz)), 1)
    hi = min(int(math.ceil((target_hz + half) / df_hz)) + 1, n)
    return lo, hi


def find_peak(amp, df_hz, target_hz, tol_hz, min_half_bins=1.5):
    """The largest bin near a target frequency.

    Parameters
    ----------
    amp : ndarray or list of float
        Amplitude spectrum.
    df_hz : float
        Bin spacing in Hz.
    target_hz : float
        Where the peak is expected.
    tol_hz : float
        Half-width of the search window (e.g. 2 % of the target for bearing
        slip); widened to ``min_half_bins`` bins when narrower.
    min_half_bins : float, default 1.5

    Returns
    -------
    Peak or None
        ``None`` when the window lies outside the spectrum, or when the
        largest bin is the flank of a line outside the window (its
        interpolated frequency falls outside).  The frequency is
        refined by fitting a parabola through the peak bin and its neighbours;
        the amplitude is the peak bin's value (no scalloping correction).
    """
    n = len(amp)
    lo, hi = _window_bins(target_hz, tol_hz, df_hz, n, min_half_bins)
    if hi - lo < 1 or target_hz <= 0:
        return None
    first = max(lo - 1, 0)
    window = bin_floats(amp, first, hi + 1)  # the searched bins and a neighbour each side
    i0 = lo - first
    i = window.index(max(window[i0:i0 + hi - lo]), i0)  # the first largest bin, as numpy.argmax
    k = first + i
    offset = 0.0
    if 0 < k < n - 1:
        a, b, c = window[i - 1:i + 2]
        denom = a - 2.0 * b + c
        if denom < 0:
            offset = min(max(0.5 * (a - c) / denom, -0.5), 0.5)
    else:
        b = window[i]
    freq_hz = (k + offset) * df_hz
    if abs(freq_hz - target_hz) > max(tol_hz, min_half_bins * df_hz):
        return None  # the window's edge holds the flank of a neighbouring line
    return Peak(freq_hz, b, k)


def noise_floor(amp, df_hz, center_hz, half_width_hz, guard_bins=3, exclude_hz=(),
                min_bins=12):
    """Median amplitude around a frequency, leaving out the centre.

    Parameters
    ----------
    amp : ndarray or list of float
        Amplitude spectrum.
    df_hz : float
        Bin spacing.
    center_hz : float
        Frequency of the peak being judged.
    half_width_hz : float
        Half-width of the neighbourhood used.
    guard_bins : int, default 3
        Bins either side of the centre left out (the peak's main lobe).
    exclude_hz : sequence of float, optional
        Other frequencies whose bins (``guard_bins`` either side) are left
        out too: where the peak's own sidebands are expected.  Near a line at
        a low frequency, seen at a coarse resolution, they would otherwise
        fill most of the neighbourhood and the median would be theirs, not
        the floor's.
    min_bins : int, default 12
        With ``exclude_hz``: the neighbourhood is widened (doubled, at most
        three times) until at least this many bins are left.

    Returns
    -------
    float
        The median, a robust estimate of the local floor that ignores other
        isolated lines.  ``nan`` when no bin is left.
    """
    n = len(amp)
    c = int(round(center_hz / df_hz))
    hw = max(int(round(half_width_hz / df_hz)), guard_bins + 4)
    if not exclude_hz:
        lo, hi = max(c - hw, 1), min(c + hw + 1, n)
        v = bin_floats(amp, lo, max(c - guard_bins, lo)) + bin_floats(amp, min(c + guard_bins + 1, hi), hi)
        return list_median(v) if v else math.nan
    out = sorted([c] + [int(round(f / df_hz)) for f in exclude_hz])
    for _ in range(4):
        lo, hi = max(c - hw, 1), min(c + hw + 1, n)
        part = bin_floats(amp, lo, hi)
        v, at = [], lo  # the bins between the left-out stretches, in slices
        for e in out:
            if e - guard_bins > at:
                v += part[at - lo:min(e - guard_bins, hi) - lo]
            at = max(at, e + guard_bins + 1)
        if at < hi:
            v += part[at - lo:]
        if len(v) >= min_bins or (lo == 1 and hi == n):
            break
        hw *= 2
    return list_median(v) if v else math.nan


def snr_db(peak_amplitude, floor_amplitude):
    """Amplitude ratio in dB, ``20 log10(peak / floor)``; 0 when undefined."""
    if not (floor_amplitude > 0 and peak_amplitude > 0):
        return 0.0
    return 20.0 * math.log10(peak_amplitude / floor_amplitude)


def sideband_ratio(amp, df_hz, carrier_hz, modulation_hz, tol_hz):
    """Sum of the two sidebands over the carrier, ``(A- + A+) / Ac``.

    Parameters
    ----------
    amp : ndarray or list of float
        Amplitude spectrum.
    df_hz : float
        Bin spacing in Hz.
    carrier_hz : float
        Frequency of the carrier line (e.g. the found BPFO).
    modulation_hz : float
        Sideband spacing (shaft speed around BPFO/BPFI, FTF around 2xBSF).
    tol_hz : float
        Search half-width for each line.

    Returns
    -------
    ratio : float
        ``(A(fc - fm) + A(fc + fm)) / A(fc)``.  For a pure amplitude
        modulation ``(1 + m cos(2 pi fm t)) cos(2 pi fc t)`` each sideband is
        ``m / 2`` of the carrier, so the ratio equals the modulation depth
        ``m``.  ``nan`` when a line falls outside the spectrum.
    lower, upper : float
        The two sideband amplitudes.
    """
    if not modulation_hz > 0:
        raise ValueError(f"{modulation_hz=} must be positive")
    n = len(amp)
    lo_hz, hi_hz = carrier_hz - modulation_hz, carrier_hz + modulation_hz
    if lo_hz <= 0 or hi_hz + tol_hz >= n * df_hz:
        return math.nan, math.nan, math.nan
    c = find_peak(amp, df_hz, carrier_hz, tol_hz)
    if c is None or c.amplitude <= 0:
        return math.nan, math.nan, math.nan

    def side(f_hz):
        pk = find_peak(amp, df_hz, f_hz, tol_hz)
        # no line there: the spectrum's own level at that frequency
        return pk.amplitude if pk is not None else float(amp[int(round(f_hz / df_hz))])

    lower, upper = side(lo_hz), side(hi_hz)
    return (lower + upper) / c.amplitude, lower, upper
