"""Segment spectra: window, Welch power spectral density, velocity from acceleration.

- :func:`hann`: the periodic Hann window (as ``scipy.signal.get_window('hann', n)``).
- :func:`psd_scale`: factor turning an accumulated ``|X|**2`` into a one-sided
  power spectral density, the scaling of ``scipy.signal.welch(scaling='density')``.
- :func:`welch_psd`: reference Welch estimate of a whole array (tests, tools).
- :func:`velocity_rms_mm_s`: broadband velocity RMS from an acceleration PSD,
  integrating in the frequency domain (divide by (2 pi f)**2).
- :func:`band_rms`: RMS of a PSD over a band (Parseval).
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["hann", "psd_scale", "welch_psd", "velocity_rms_mm_s", "band_rms"]


def hann(n):
    """Periodic Hann window of ``n`` points.

    Parameters
    ----------
    n : int
        Window length (the segment length ``nperseg``).

    Returns
    -------
    ndarray
        ``0.5 - 0.5 cos(2 pi k / n)``, k = 0..n-1 (the DFT-even form used for
        spectral analysis, identical to ``scipy.signal.get_window('hann', n)``).
    """
    if n < 2:
        raise ValueError(f"{n=} must be >= 2")
    k = np.arange(n)
    return 0.5 - 0.5 * np.cos(2.0 * np.pi * k / n)


def psd_scale(window, fs):
    """Scale from a sum of ``|rfft(x * window)|**2`` to a one-sided PSD.

    Parameters
    ----------
    window : ndarray
        The window applied to each segment.
    fs : float
        Sample rate in Hz.

    Returns
    -------
    float
        ``2 / (fs * sum(window**2))``; the DC bin (and the Nyquist bin for an
        even ``nperseg``) takes half of it.  Divide by the number of averaged
        segments as well.

    Notes
    -----
    With this scaling, ``sum(psd) * df`` equals the mean square of the signal
    (Parseval), as for ``scipy.signal.welch(..., scaling='density')``.
    """
    return 2.0 / (fs * float(np.dot(window, window)))


def welch_psd(x, fs, nperseg, window=None):
    """One-sided Welch PSD of ``x`` with 50 % overlap and segment mean removed.

    Parameters
    ----------
    x : array_like
        Signal, e.g. acceleration in m/s².
    fs : float
        Sample rate in Hz.
    nperseg : int
        Segment length.
    window : ndarray, optional
        Defaults to :func:`hann` of ``nperseg``.

    Returns
    -------
    f : ndarray
        Frequencies in Hz.
    psd : ndarray
        Power spectral density in (unit)²/Hz, equal to
        ``scipy.signal.welch(x, fs, nperseg=nperseg, detrend='constant')``.
    """
    x = np.asarray(x, dtype=float)
    if nperseg < 2 or nperseg > x.size:
        raise ValueError(f"{nperseg=} must be in [2, len(x)={x.size}]")
    w = hann(nperseg) if window is None else window
    hop = nperseg - nperseg // 2  # scipy's default noverlap = nperseg // 2
    acc = np.zeros(nperseg // 2 + 1)
    count = 0
    for start in range(0, x.size - nperseg + 1, hop):
        seg = x[start:start + nperseg]
        spec = np.fft.rfft((seg - seg.mean()) * w)
        acc += spec.real ** 2 + spec.imag ** 2
        count += 1
    psd = acc * psd_scale(w, fs) / count
    psd[0] /= 2.0
    if nperseg % 2 == 0:
        psd[-1] /= 2.0
    return np.fft.rfftfreq(nperseg, 1.0 / fs), psd


def band_rms(psd, df_hz, lo_bin, hi_bin):
    """RMS over bins ``lo_bin`` to ``hi_bin`` (exclusive) of a PSD.

    Parameters
    ----------
    psd : ndarray
        Power spectral density in unit²/Hz.
    df_hz : float
        Bin spacing in Hz.
    lo_bin, hi_bin : int

    Returns
    -------
    float
        ``sqrt(sum(psd[lo:hi]) * df)`` in the signal's unit.
    """
    return math.sqrt(max(float(psd[lo_bin:hi_bin].sum()) * df_hz, 0.0))


def velocity_rms_mm_s(accel_psd, df_hz, lo_hz, hi_hz, weight=None):
    """Velocity RMS in mm/s from an acceleration PSD.

    Parameters
    ----------
    accel_psd : ndarray
        One-sided acceleration PSD in (m/s²)²/Hz on bins ``k * df_hz``.
    df_hz : float
        Bin spacing in Hz.
    lo_hz, hi_hz : float
        Velocity band, e.g. 10-1000 Hz (ISO 20816).  Bins whose centre lies in
        ``[lo_hz, hi_hz]`` count.
    weight : ndarray, optional
        Precomputed ``1 / (2 pi f)**2`` for the band's bins (saves a division
        per call in the pipeline).

    Returns
    -------
    float
        Velocity RMS in mm/s.

    Notes
    -----
    A sine of acceleration amplitude ``a`` at angular frequency ``w`` has a
    velocity amplitude ``a / w``; the PSD is divided by ``w**2`` bin by bin
    and summed (Parseval).  Example: 10 m/s² RMS at 159.2 Hz (w = 1000 rad/s)
    is 10 mm/s RMS.
    """
    if not (0 < lo_hz < hi_hz):
        raise ValueError(f"{lo_hz=} and {hi_hz=} must satisfy 0 < lo_hz < hi_hz")
    lo = int(math.ceil(lo_hz / df_hz))
    hi = min(int(math.floor(hi_hz / df_hz)) + 1, accel_psd.shape[0])
    if hi <= lo:
        return 0.0
    if weight is None:
        f = np.arange(lo, hi) * df_hz
        weight = 1.0 / (2.0 * np.pi * f) ** 2
    v2 = float(np.dot(accel_psd[lo:hi], weight)) * df_hz
    return 1000.0 * math.sqrt(max(v2, 0.0))
