"""The FFTs of the steady-state analysis: single precision, in place, only the bins needed.

This is the one place that decides which FFT the pipeline runs and in what
precision:

- :class:`RealSpectrum`: real FFTs of a batch of even-length ``float32``
  rows, computed in place as half-length complex FFTs; the caller then asks
  for the bin ranges it needs (:meth:`RealSpectrum.bins`).
- :func:`fft_inplace`: forward complex FFT written over its input (one
  vector, or each row of a matrix).
- :func:`fast_length`: the smallest transform length at least ``n`` with
  only the prime factors 2, 3 and 5, a multiple of a given step.

Why ``scipy.fft`` in ``float32``
--------------------------------
The segment FFT is most of the cost of an analysis.  ``scipy.fft`` runs
single-precision transforms with SIMD, about twice as fast as
``numpy.fft`` in double precision (0.23 against 0.52 ms for 65 536 points on
the development machine, see ``tools/bench``), and its working set is half as
large.  The samples come from 16- or 24-bit converters, which ``float32``
(24-bit mantissa) holds exactly; the round-off of a transform stays near
-140 dB of the segment's power, far below any line the analysis judges.  Sums
over segments (power spectra, moments) are kept in ``float64``.

``scipy.fft`` is imported here and nowhere else on the daemon's path;
``scipy.signal`` is never imported by the daemon.

Why in place
------------
``scipy.fft``'s real transform has no output argument: it would return a new
array per segment.  Its complex transform with ``overwrite_x=True`` writes
over its input.  A real sequence of even length ``n`` viewed as ``n / 2``
complex numbers (even samples real, odd samples imaginary) is transformed in
place, and any bin of the real FFT follows from two bins of that transform
([1]_).  The pipeline needs only the low bins (velocity, speed) and the
demodulation band, so only those are unpacked, into arrays allocated once.
(The library still takes and frees its own scratch inside each call; that
memory is constant and not seen by Python.)

Why batches
-----------
``scipy.fft`` vectorises across the rows of a batch rather than within one
transform: four rows of 32 768 complex points take about 100 us each, one
row alone about 220 us.  The pipeline windows four segments into one batch.
Rows are run side by side in groups of four only; the rows left over are
transformed one after another, so two or three rows cost as much as four or
more (32 768 points: 2 rows 434 us, 3 rows 733 us, 4 rows 422 us; 16 384
points: 210, 308 and 175 us).  A batch that is not full is therefore
transformed whole (:func:`rows_to_transform`): the extra rows hold stale data
and are not read.

References
----------
.. [1] E. O. Brigham, *The Fast Fourier Transform and its Applications*,
   Prentice Hall, 1988, sec. 9.3 (the FFT of a 2N-point real sequence by an
   N-point complex FFT).
"""

from __future__ import annotations

import numpy as np
from scipy import fft as _fft

__all__ = ["RealSpectrum", "fft_inplace", "fast_length", "rows_to_transform"]

#: Rows ``scipy.fft`` transforms side by side in one SIMD pass (complex64).
SIMD_ROWS = 4


def rows_to_transform(rows, capacity):
    """Rows worth transforming when the first ``rows`` of a batch are wanted.

    Parameters
    ----------
    rows : int
        Rows whose transforms are needed (``1 <= rows <= capacity``).
    capacity : int
        Rows the batch holds; rows past ``rows`` may be transformed too, their
        contents are lost.

    Returns
    -------
    int
        ``rows`` rounded up to a whole group of :data:`SIMD_ROWS` (not past
        ``capacity``) when at least two rows are wanted: the leftover rows of a
        group would be transformed one by one, slower than the whole group.
        One row alone stays one row (half the time of a group of four).
    """
    if rows < 2:
        return rows
    return min(capacity, -(-rows // SIMD_ROWS) * SIMD_ROWS)


def fft_inplace(z):
    """Forward complex FFT, written over ``z``.

    Parameters
    ----------
    z : ndarray, complex64 or complex128, 1-D or 2-D, C-contiguous
        Input; receives ``numpy.fft.fft(z, axis=-1)`` (unnormalised): each
        row of a 2-D array is transformed.

    Returns
    -------
    ndarray
        ``z`` itself.

    Notes
    -----
    The forward transform is offered rather than the inverse because
    ``scipy.fft`` runs it about 1.5 times faster in single precision (48
    against 72 us for 8192 points on the development machine).  An inverse
    transform is a forward one of the conjugate: ``ifft(X) = conj(fft(conj(X))) / n``.
    """
    if z.dtype not in (np.complex64, np.complex128) or z.ndim not in (1, 2) \
            or not z.flags.c_contiguous:
        raise ValueError(f"z must be 1-D or 2-D C-contiguous complex, got {z.dtype} "
                         f"with shape {z.shape}")
    out = _fft.fft(z, axis=-1, overwrite_x=True)
    if not np.shares_memory(out, z):  # a scipy that ignores overwrite_x: keep the contract
        z[:] = out
    return z


def fast_length(n, multiple=2):
    """Smallest ``m >= n``, a multiple of ``multiple``, with prime factors 2, 3, 5 only.

    Parameters
    ----------
    n : int
        Least length wanted (>= 1).
    multiple : int, default 2
        A power of two the length must be a multiple of.

    Returns
    -------
    int
        E.g. 6563 -> 6750 and 5461 -> 5760; never more than the next power
        of two.  Such lengths transform nearly as fast per point as powers of
        two (6750 points: 30 us, 8192 points: 47 us, complex64, development
        machine).
    """
    if n < 1 or multiple < 1 or multiple & (multiple - 1):
        raise ValueError(f"{n=} must be >= 1 and {multiple=} a power of two")
    best = 1 << max(int(n - 1).bit_length(), multiple.bit_length() - 1)
    p3 = 1
    while p3 < best:
        p35 = p3
        while p35 < best:
            m = p35 * multiple
            while m < n:
                m *= 2
            best = min(best, m)
            p35 *= 5
        p3 *= 3
    return best


class RealSpectrum:
    """Real FFTs of ``float32`` rows of even length, in place, bins on demand.

    Parameters
    ----------
    n : int
        Transform length (even, at least 4).
    max_bins : int
        Longest bin range :meth:`bins` will be asked for (sets the scratch).
    rows : int, default 1
        How many sequences are transformed together.  ``scipy.fft`` runs the
        rows of a batch through SIMD side by side: 4 rows of 32 768 complex
        points take 99 us each against 218 us for one alone (development
        machine).

    Attributes
    ----------
    buffers : ndarray, float32, shape (rows, n)
        Fill rows with samples, then call :meth:`transform`.
    buffer : ndarray, float32, length n
        ``buffers[0]``, for single-row use.

    Notes
    -----
    With ``z[k] = x[2k] + 1j x[2k+1]`` and ``Z = fft(z)`` (length ``h = n/2``),
    the real FFT of ``x`` is, for ``0 <= k <= h``::

        X[k] = (Z[k] + conj(Z[-k])) / 2 - 1j/2 * exp(-2j pi k / n) * (Z[k] - conj(Z[-k]))

    with indices of ``Z`` taken modulo ``h`` (Brigham 1988, sec. 9.3).  The
    twiddle factors are computed once, in double precision.
    """

    def __init__(self, n, max_bins, rows=1):
        if n < 4 or n % 2:
            raise ValueError(f"{n=} must be even and at least 4")
        if not 1 <= max_bins <= n // 2 + 1:
            raise ValueError(f"{max_bins=} must be in [1, n // 2 + 1 = {n // 2 + 1}]")
        if rows < 1:
            raise ValueError(f"{rows=} must be >= 1")
        self.n = n
        self.half = n // 2
        self.rows = rows
        self.buffers = np.zeros((rows, n), dtype=np.float32)
        self.buffer = self.buffers[0]
        self._z = self.buffers.view(np.complex64)  # shape (rows, n // 2)
        k = np.arange(self.half + 1)
        self._twiddle = (-0.5j * np.exp(-2j * np.pi * k / n)).astype(np.complex64)
        self._a = np.empty(max_bins, dtype=np.complex64)
        self._b = np.empty(max_bins, dtype=np.complex64)

    def transform(self, rows=None):
        """Transform the first ``rows`` rows (default all) in place; their samples are lost.

        Further rows of the batch may be transformed as well when that is
        faster (:func:`rows_to_transform`): their contents are lost too.
        """
        rows = self.rows if rows is None else rows
        if not 1 <= rows <= self.rows:
            raise ValueError(f"{rows=} must be in [1, {self.rows}]")
        rows = rows_to_transform(rows, self.rows)
        fft_inplace(self._z[0] if rows == 1 else self._z[:rows])

    def bins(self, lo_bin, hi_bin, out, row=0):
        """Bins ``lo_bin:hi_bin`` of one row's real FFT, after :meth:`transform`.

        Parameters
        ----------
        lo_bin, hi_bin : int
            ``0 <= lo_bin < hi_bin <= n // 2 + 1``, at most ``max_bins`` bins.
        out : ndarray, complex64, length ``hi_bin - lo_bin``
            Receives ``numpy.fft.rfft(samples)[lo_bin:hi_bin]``.
        row : int, default 0
            Which row.

        Returns
        -------
        ndarray
            ``out``.
        """
        h = self.half
        nb = hi_bin - lo_bin
        if not (0 <= lo_bin < hi_bin <= h + 1) or nb > self._a.shape[0] or out.shape[0] != nb:
            raise ValueError(f"bins {lo_bin}:{hi_bin} with output of {out.shape[0]} do not fit "
                             f"n={self.n} and max_bins={self._a.shape[0]}")
        z = self._z[row]
        first, last = lo_bin, hi_bin
        if lo_bin == 0:  # Z[-0] = Z[0]: bin 0 on its own
            out[0] = z[0].real + z[0].imag
            first = 1
        if hi_bin == h + 1:  # the Nyquist bin, Z[h] = Z[0]
            out[nb - 1] = z[0].real - z[0].imag
            last = h
        if first < last:
            m = last - first
            zk = z[first:last]
            zr = z[h - last + 1:h - first + 1][::-1]  # Z[h - k] for k = first..last-1
            a, b = self._a[:m], self._b[:m]
            np.conjugate(zr, out=a)
            np.subtract(zk, a, out=b)          # Z[k] - conj(Z[-k])
            np.add(zk, a, out=a)               # Z[k] + conj(Z[-k])
            a *= 0.5
            b *= self._twiddle[first:last]
            np.add(a, b, out=out[first - lo_bin:last - lo_bin])
        return out
