"""Squared-envelope spectrum computed from segment spectra (no time-domain filter).

The band around the structural resonance is cut out of a segment's spectrum,
moved to base band and transformed back with a short inverse FFT: that is the
analytic signal of the band-passed segment, already decimated.  Its squared
magnitude is the squared envelope, whose spectrum shows the repetition rate of
the impacts (the defect frequency) and its harmonics.

- :func:`band_analytic`: analytic signal of one band of a segment spectrum.
- :func:`taper_squared`: the taper that the segment window leaves on the
  squared envelope (``hann**2`` on the decimated grid).
- :func:`envelope_power`: one segment's contribution to the averaged
  squared-envelope power spectrum.
- :func:`envelope_amplitude`: averaged power to line amplitudes.

Every function writes into arrays given by the caller, so the pipeline
allocates them once.

References
----------
.. [1] R. B. Randall, J. Antoni, "Rolling element bearing diagnostics -- A
   tutorial", Mech. Syst. Signal Process. 25 (2011) 485-520, section 3.2
   (envelope analysis; the squared envelope; frequency-domain band-pass and
   Hilbert transform in one step).
.. [2] D. Ho, R. B. Randall, "Optimisation of bearing diagnostic techniques
   using simulated and actual bearing fault signals", Mech. Syst. Signal
   Process. 14 (2000) 763-788 (why the squared envelope).
"""

from __future__ import annotations

import numpy as np

__all__ = ["band_analytic", "taper_squared", "envelope_power", "envelope_amplitude"]


def band_analytic(spectrum, nperseg, lo_bin, hi_bin, work, out):
    """Analytic signal of bins ``lo_bin:hi_bin`` of a segment spectrum.

    Parameters
    ----------
    spectrum : ndarray, complex
        ``rfft`` of a windowed segment of ``nperseg`` samples.
    nperseg : int
        Segment length.
    lo_bin, hi_bin : int
        The band, as bin indices (``hi_bin`` exclusive).
    work : ndarray, complex, length m
        Scratch; ``m`` sets the decimated length (``m >= hi_bin - lo_bin``).
    out : ndarray, complex, length m
        Receives the analytic signal, shifted down by ``lo_bin`` bins (a
        frequency shift leaves the envelope unchanged), sampled at
        ``m / nperseg * fs``, scaled so that ``|out|`` is the envelope in the
        signal's unit (times the segment window).

    Returns
    -------
    ndarray
        ``out``.

    Notes
    -----
    For ``x = a cos(2 pi f t)`` with ``f`` in the band, ``rfft`` gives
    ``a * nperseg / 2`` at ``f``; the inverse FFT of length ``m`` divides by
    ``m``; the factor ``2 m / nperseg`` restores ``|out| = a``.
    """
    nb = hi_bin - lo_bin
    m = out.shape[0]
    if not (0 <= lo_bin < hi_bin <= spectrum.shape[0]) or nb > m or work.shape[0] != m:
        raise ValueError(f"band {lo_bin}:{hi_bin} does not fit spectrum of {spectrum.shape[0]} "
                         f"bins and work length {m}")
    work[:nb] = spectrum[lo_bin:hi_bin]
    work[nb:] = 0.0
    np.fft.ifft(work, out=out)
    out *= 2.0 * m / nperseg
    return out


def taper_squared(m, out):
    """Square of the periodic Hann window of length ``m``, into ``out[:m]``.

    The segment was windowed before the band was cut, so its squared envelope
    carries ``hann(t)**2``; this taper (a valid spectral window in itself) is
    what the envelope spectrum is computed with.
    """
    v = out[:m]
    k = np.arange(m, dtype=float)
    np.multiply(k, 2.0 * np.pi / m, out=v)
    np.cos(v, out=v)
    v *= -0.5
    v += 0.5
    np.multiply(v, v, out=v)
    return v


def envelope_power(z, taper, sq, tmp, spec, acc):
    """Add one segment's squared-envelope power spectrum to ``acc``.

    Parameters
    ----------
    z : ndarray, complex, length m
        Output of :func:`band_analytic`.
    taper : ndarray, length m
        :func:`taper_squared` of ``m``.
    sq, tmp : ndarray, float, length m
        Scratch.
    spec : ndarray, complex, length >= m // 2 + 1
        Scratch for the spectrum of the squared envelope.
    acc : ndarray, float, length <= m // 2 + 1
        Accumulated power; its first ``len(acc)`` bins are updated.

    Notes
    -----
    The mean of the squared envelope is removed as ``taper * c`` with
    ``c = sum(sq) / sum(taper)``, the mean of ``|envelope|**2`` under the
    taper, so that no DC leaks into the lowest bins.
    """
    m = z.shape[0]
    k = acc.shape[0]
    np.multiply(z.real, z.real, out=sq)
    np.multiply(z.imag, z.imag, out=tmp)
    sq += tmp
    c = float(sq.sum()) / float(taper.sum())
    np.multiply(taper, c, out=tmp)
    sq -= tmp
    s = spec[:m // 2 + 1]
    np.fft.rfft(sq, out=s)
    t = tmp[:k]
    np.multiply(s[:k].real, s[:k].real, out=t)
    acc += t
    np.multiply(s[:k].imag, s[:k].imag, out=t)
    acc += t


def envelope_amplitude(acc, segments, taper_sum, out):
    """Averaged squared-envelope power to single-sided line amplitudes.

    Parameters
    ----------
    acc : ndarray
        Power accumulated by :func:`envelope_power`.
    segments : int
        Number of segments added.
    taper_sum : float
        ``sum(taper)``.
    out : ndarray
        Receives the amplitude of each bin in (m/s²)²: a component
        ``A cos(2 pi f t)`` of the squared envelope reads ``A`` at ``f``.
    """
    np.multiply(acc, 4.0 / (segments * taper_sum * taper_sum), out=out)
    np.sqrt(out, out=out)
    out[0] = 0.0
    return out
