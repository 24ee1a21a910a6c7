"""Squared-envelope spectrum computed from segment spectra (no time-domain filter).

The band around the structural resonance is cut out of a segment's spectrum,
moved to base band and transformed back with a short inverse FFT: that is the
analytic signal of the band-passed segment, already decimated.  Its squared
magnitude is the squared envelope, whose spectrum shows the repetition rate of
the impacts (the defect frequency) and its harmonics.

- :func:`band_analytic`: analytic signal of one band of a segment spectrum.
- :func:`taper_squared`: the taper that the segment window leaves on the
  squared envelope (``hann**2`` on the decimated grid), and
  :func:`taper_squared_head`: its three non-zero DFT bins.
- :func:`envelope_power`: one segment's contribution to the averaged
  squared-envelope power spectrum; :func:`envelope_power_rows`: several
  segments' at once, from their band bins loaded by :func:`load_band` (what
  the pipeline runs).
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

from agent.dsp.fastfft import fft_inplace, rows_to_transform

__all__ = ["band_analytic", "taper_squared", "taper_squared_head", "envelope_power",
           "load_band", "envelope_power_rows", "envelope_amplitude"]


def band_analytic(spectrum, nperseg, lo_bin, hi_bin, out):
    """Analytic signal of bins ``lo_bin:hi_bin`` of a segment spectrum.

    Parameters
    ----------
    spectrum : ndarray, complex
        ``rfft`` of a windowed segment of ``nperseg`` samples.
    nperseg : int
        Segment length.
    lo_bin, hi_bin : int
        The band, as bin indices (``hi_bin`` exclusive).
    out : ndarray, complex64 or complex128, length m, contiguous
        Receives the complex conjugate of the analytic signal, shifted down by
        ``lo_bin`` bins (a frequency shift leaves the envelope unchanged),
        sampled at ``m / nperseg * fs``, scaled so that ``|out|`` is the
        envelope in the signal's unit (times the segment window).
        ``m >= hi_bin - lo_bin`` sets the decimated length.

    Returns
    -------
    ndarray
        ``out``.

    Notes
    -----
    For ``x = a cos(2 pi f t)`` with ``f`` in the band, ``rfft`` gives
    ``a * nperseg / 2`` at ``f``; the factor ``2 / nperseg`` restores
    ``|out| = a``.  The band's inverse FFT is computed as the forward FFT of
    its conjugate, in place (:func:`agent.dsp.fastfft.fft_inplace`):
    ``fft(conj(X)) = m conj(ifft(X))``.  Only ``|out|`` is used downstream,
    which the conjugate leaves unchanged.
    """
    nb = hi_bin - lo_bin
    m = out.shape[0]
    if not (0 <= lo_bin < hi_bin <= spectrum.shape[0]) or nb > m:
        raise ValueError(f"band {lo_bin}:{hi_bin} does not fit spectrum of {spectrum.shape[0]} "
                         f"bins and output length {m}")
    np.conjugate(spectrum[lo_bin:hi_bin], out=out[:nb])
    out[nb:] = 0.0
    fft_inplace(out)
    out *= 2.0 / nperseg
    return out


def taper_squared(m, out):
    """Square of the periodic Hann window of length ``m``, into ``out[:m]``.

    The segment was windowed before the band was cut, so its squared envelope
    carries ``hann(t)**2``; this taper (a valid spectral window in itself) is
    what the envelope spectrum is computed with.  Its DFT has three non-zero
    bins, ``3m/8, -m/4, m/16`` (see :func:`taper_squared_head`).
    """
    v = out[:m]
    k = np.arange(m, dtype=float)
    np.multiply(k, 2.0 * np.pi / m, out=v)
    np.cos(v, out=v)
    v *= -0.5
    v += 0.5
    np.multiply(v, v, out=v)
    return v


def taper_squared_head(m):
    """The non-zero bins 0, 1, 2 of the DFT of :func:`taper_squared` of ``m``.

    ``hann**2 = 3/8 - cos(theta)/2 + cos(2 theta)/8`` with
    ``theta = 2 pi k / m``, so its DFT is ``3m/8`` at bin 0, ``-m/4`` at bin 1
    and ``m/16`` at bin 2, and zero elsewhere (``m >= 6``).

    Returns
    -------
    ndarray, complex64, length 3
    """
    if m < 6:
        raise ValueError(f"{m=} must be >= 6")
    return np.array([3.0 * m / 8.0, -m / 4.0, m / 16.0], dtype=np.complex64)


def envelope_power(z, head, spectrum, tmp, bins, acc):
    """Add one segment's squared-envelope power spectrum to ``acc``.

    Parameters
    ----------
    z : ndarray, complex64, length m
        Output of :func:`band_analytic`.
    head : ndarray, complex64, length 3
        :func:`taper_squared_head` of ``m``.
    spectrum : RealSpectrum
        :class:`agent.dsp.fastfft.RealSpectrum` of length ``m``; its buffer
        holds the squared envelope.
    tmp : ndarray, float32, length >= m
        Scratch.
    bins : ndarray, complex64, length ``len(acc)``
        Scratch for the squared envelope's spectrum (reused for the float64
        copy of its power, so that no mixed-precision operation needs a
        casting buffer).
    acc : ndarray, float64, length between 3 and ``m // 2 + 1``
        Accumulated power; its first ``len(acc)`` bins are updated.

    Notes
    -----
    The mean of the squared envelope is removed as ``taper * c`` with
    ``c = sum(sq) / sum(taper)``, the mean of ``|envelope|**2`` under the
    taper, so that no DC leaks into the lowest bins.  Because the taper's DFT
    has only three non-zero bins, this is done on the spectrum: ``sum(sq)`` is
    bin 0 of ``rfft(sq)``, and ``c`` times the taper's three bins is
    subtracted from bins 0-2.  Nothing is allocated.
    """
    m = z.shape[0]
    k = acc.shape[0]
    if spectrum.n != m or not 3 <= k <= m // 2 + 1 or bins.shape[0] != k:
        raise ValueError(f"spectrum of {spectrum.n}, {k} bins and scratch of {bins.shape[0]} "
                         f"do not fit an envelope of {m} samples")
    sq = spectrum.buffer
    t = tmp[:m]
    np.multiply(z.real, z.real, out=sq)
    np.multiply(z.imag, z.imag, out=t)
    sq += t
    spectrum.transform()
    s = spectrum.bins(0, k, bins)
    c = s[0].real / head[0].real
    s[:3] -= c * head
    t = tmp[:k]
    np.multiply(s.real, s.real, out=t)
    np.multiply(s.imag, s.imag, out=sq[:k])
    t += sq[:k]
    wide = bins.view(np.float64)  # the bins are used up: their 8-byte items hold the float64 copy
    wide[:] = t
    acc += wide


def load_band(band, nperseg, row):
    """Copy a segment's band bins into a row of :func:`envelope_power_rows`'s
    matrix, scaled by ``2 / nperseg`` (so that ``|analytic| = a`` for a tone
    of amplitude ``a``, as in :func:`band_analytic`).

    Parameters
    ----------
    band : ndarray, complex, length nb
        The demodulation band's bins of one segment spectrum.
    nperseg : int
        Segment length.
    row : ndarray, complex64, length m >= nb
        A row of the matrix; its first ``nb`` entries are written.
    """
    np.multiply(band, 2.0 / nperseg, out=row[:band.shape[0]])


def envelope_power_rows(z, rows, nb, head, w, tmp, acc):
    """Add several segments' squared-envelope power spectra to ``acc`` at once.

    The same result as :func:`band_analytic` and :func:`envelope_power` for
    each segment, with fewer and cheaper transforms: all bands go through one
    FFT of ``rows`` rows, and the real squared envelopes, two to a row,
    through one complex FFT of half as many rows (``scipy.fft`` runs the rows
    of a matrix side by side: four rows cost little more than two).

    Parameters
    ----------
    z : ndarray, complex64, shape (R, m), C-contiguous
        Rows ``0 .. rows - 1`` hold, in their first ``nb`` entries, one
        segment's band bins loaded by :func:`load_band`; the matrix is used
        up (the other rows too: a partial batch is transformed whole when
        that is faster, see :func:`agent.dsp.fastfft.rows_to_transform`).
    rows : int
        Segments loaded, ``1 <= rows <= R``.
    nb : int
        Band bins per row, ``nb <= m``.
    head : ndarray, complex64, length 3
        :func:`taper_squared_head` of ``m``.
    w : ndarray, complex64, shape (P, m), C-contiguous, ``P >= (rows + 1) // 2``
        Scratch for the squared envelopes.
    tmp : ndarray, float32, length >= m
        Scratch.
    acc : ndarray, float64, length K, ``3 <= K <= m // 2 + 1``
        Accumulated power, as :func:`envelope_power` leaves it.

    Notes
    -----
    - The bands are transformed forwards without conjugation: the result is
      the analytic signal reversed in time (``fft(X) = m ifft(X)`` at
      ``-t``).  The reversal changes neither the envelope's values nor its
      power spectrum, and the squared Hann taper is symmetric, so the mean
      removal is unchanged.
    - Two real sequences in one complex FFT: with ``W = fft(a + 1j b)``,
      ``A = (W[k] + conj(W[-k])) / 2`` and ``B = (W[k] - conj(W[-k])) / 2j``,
      hence ``|A[k]|**2 + |B[k]|**2 = (|W[k]|**2 + |W[-k]|**2) / 2`` (Brigham
      1988, sec. 9.3): the summed power needs no separation.  An odd segment
      out shares its row with zeros.
    - The means are removed on the spectrum as in :func:`envelope_power`,
      with ``c = W[0] / sum(taper)`` holding both segments' means (real and
      imaginary part) and subtracted at bins 0, +-1, +-2.
    - Every operation works on one contiguous row or a 1-D view of one, so
      numpy needs no hidden buffer.
    """
    m = z.shape[1]
    pairs = (rows + 1) // 2
    k = acc.shape[0]
    if not 1 <= rows <= z.shape[0] or nb > m or w.shape[0] < pairs or w.shape[1] != m \
            or not 3 <= k <= m // 2 + 1 or tmp.shape[0] < m:
        raise ValueError(f"{rows} rows of {nb} bins, scratch {z.shape} and {w.shape}, {k} bins "
                         f"do not fit")
    z[:rows, nb:] = 0.0
    whole = rows_to_transform(rows, z.shape[0])  # rows past `rows` are not read
    fft_inplace(z[:whole] if whole > 1 else z[0])
    t = tmp[:m]
    for r in range(rows):
        part = w[r // 2].imag if r % 2 else w[r // 2].real
        np.multiply(z[r].real, z[r].real, out=part)
        np.multiply(z[r].imag, z[r].imag, out=t)
        part += t
    if rows % 2:
        w[pairs - 1].imag[:] = 0.0
    fft_inplace(w[:pairs] if pairs > 1 else w[0])
    # (|W[k]|^2 + |W[m-k]|^2) / 2 for k = 1 .. K-1, summed over the rows; bin 0 holds no line
    p = tmp[:k - 1]
    q = tmp[m - k + 1:m]  # apart from p: k <= m // 2 + 1
    p[:] = 0.0
    for i in range(pairs):
        row = w[i]
        c = row[0] / head[0].real
        row[:3] -= c * head
        row[m - 2:] -= c * head[2:0:-1]
        top = row[1:k]
        mirror = row[m - k + 1:][::-1]
        for part in (top.real, top.imag, mirror.real, mirror.imag):
            np.multiply(part, part, out=q)
            p += q
    p *= 0.5
    wide = w[0, :k - 1].view(np.float64)  # w is used up: its 8-byte items hold the float64 copy
    wide[:] = p
    acc[1:k] += wide


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
