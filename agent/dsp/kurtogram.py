"""Choosing the demodulation band by spectral kurtosis.

A bearing defect excites a resonance with short impacts: in that frequency
band the signal is impulsive and its kurtosis is high, while in bands ruled by
stationary noise or by sinusoids the kurtosis is zero or negative.  The band
with the highest spectral kurtosis is where the envelope shows the defect best.

- :func:`candidate_bands`: the 1/3-binary tree of bands of the fast kurtogram,
  limited to usable widths and edges.
- :class:`BandKurtosis`: accumulates the kurtosis of each candidate band's
  complex envelope over segments, writing into arrays allocated once.

Notes
-----
The fast kurtogram [1]_ filters the signal with a tree of quasi-analytic FIR
filters and takes, in each band, the kurtosis of the complex envelope ``c``::

    K = <|c|**4> / <|c|**2>**2 - 2

which is 0 for Gaussian noise, -1 for a pure tone and large for a train of
impacts [2]_.  Here the same tree of bands is cut out of the spectrum of a
Hann-windowed segment (an ideal, brick-wall filter bank) and the complex
envelope of each band obtained by a short inverse FFT, as in
:func:`agent.dsp.envelope.band_analytic` (bands of one length are stacked
and transformed together).  Only the central half of each
segment, where the Hann window is at least 0.5, is used, divided by the
window; with 50 % overlap the central halves of consecutive segments tile the
signal exactly, so every sample counts once.

References
----------
.. [1] J. Antoni, "Fast computation of the kurtogram for the detection of
   transient faults", Mech. Syst. Signal Process. 21 (2007) 108-124.
.. [2] J. Antoni, "The spectral kurtosis: a useful tool for characterising
   non-stationary signals", Mech. Syst. Signal Process. 20 (2006) 282-307.
"""

from __future__ import annotations

import math

import numpy as np

from agent.dsp.fastfft import fast_length, fft_inplace

__all__ = ["candidate_bands", "BandKurtosis"]


def candidate_bands(fs, min_width_hz, lo_limit_hz, hi_limit_hz, levels=8):
    """Bands of the 1/3-binary tree that are wide enough and inside the limits.

    Parameters
    ----------
    fs : float
        Sample rate in Hz.
    min_width_hz : float
        Narrowest useful band: the envelope spectrum reaches only as high as
        the band is wide, so it must hold the highest defect harmonic sought.
    lo_limit_hz, hi_limit_hz : float
        Edges a band may not cross (keep clear of shaft harmonics at the low
        end and of the converter's anti-alias filter at the top).  A band of
        the tree that crosses one is cut back to it, and kept while it is
        still wide enough: a resonance low in the spectrum (the tree's first
        band of each level starts at 0 Hz) is then still inside a candidate
        rather than on the edge of all of them.
    levels : int, default 8
        Depth of the tree.

    Returns
    -------
    list of (float, float)
        ``(lo_hz, hi_hz)`` of each usable band, widest first.
    """
    if not (0 <= lo_limit_hz < hi_limit_hz <= fs / 2):
        raise ValueError(f"{lo_limit_hz=} and {hi_limit_hz=} must lie in [0, fs/2 = {fs / 2}]")
    nyq = fs / 2.0
    out = []
    for level in range(1, levels + 1):
        for parts in (2 ** level, 3 * 2 ** (level - 1)):
            width = nyq / parts
            if width < min_width_hz:
                continue
            for i in range(parts):
                lo, hi = max(i * width, lo_limit_hz), min((i + 1) * width, hi_limit_hz)
                if hi - lo >= min_width_hz:
                    out.append((lo, hi))
    out = sorted(set(out), key=lambda b: (-(b[1] - b[0]), b[0]))
    return out


class BandKurtosis:
    """Spectral kurtosis of candidate bands, accumulated over segments.

    Parameters
    ----------
    fs : float
        Sample rate in Hz.
    nperseg : int
        Segment length (segments are Hann-windowed, 50 % overlap).
    bands : list of (float, float)
        Candidate bands in Hz, e.g. from :func:`candidate_bands`.
    max_segments : int, default 1
        Most segments one call of :meth:`add` may take (sets the scratch).
    """

    def __init__(self, fs, nperseg, bands, max_segments=1):
        if not bands:
            raise ValueError("no candidate band: widen the limits or lower the minimum width")
        df = fs / nperseg
        self.fs = fs
        self.nperseg = nperseg
        raw = []
        for lo, hi in bands:
            lo_bin, hi_bin = int(round(lo / df)), int(round(hi / df))
            lo_bin = max(lo_bin, 1)
            hi_bin = min(hi_bin, nperseg // 2 + 1)
            raw.append(((lo, hi), lo_bin, hi_bin, fast_length(max(hi_bin - lo_bin, 8), multiple=4)))
        # A band cut back at a limit is narrower than the others of its level and
        # would cost a transform of its own: it takes the next length shared by
        # several bands (at most 1.5 times its own) and joins their matrix.
        # Bands of one length are kept together, longest first.
        counts = {}
        for *_, m in raw:
            counts[m] = counts.get(m, 0) + 1
        shared = sorted(m for m, c in counts.items() if c >= 2)

        def length(m):
            return next((x for x in shared if m <= x <= 1.5 * m), m)

        self.bands, self._bins = [], []
        for band, lo_bin, hi_bin, m in sorted(raw, key=lambda r: -length(r[3])):
            self.bands.append(band)
            self._bins.append((lo_bin, hi_bin, length(m)))
        # bands of one decimated length m are transformed together, as the rows
        # of one matrix: (first band index, rows, m)
        self._groups = []
        for i, (_, _, m) in enumerate(self._bins):
            if self._groups and self._groups[-1][2] == m:
                first, rows, _ = self._groups[-1]
                self._groups[-1] = (first, rows + 1, m)
            else:
                self._groups.append((i, 1, m))
        # per group: the narrowest band's bins, where every row's zero padding has begun
        self._pad_from = {first: min(hi - lo for lo, hi, _ in self._bins[first:first + rows])
                          for first, rows, _ in self._groups}
        if max_segments < 1:
            raise ValueError(f"{max_segments=} must be >= 1")
        self.max_segments = max_segments
        size = max_segments * max(rows * m for _, rows, m in self._groups)
        self._zbuf = np.empty(size, dtype=np.complex64)
        self._pbuf = np.empty(size, dtype=np.float32)
        self._p2buf = np.empty(size, dtype=np.float32)
        self._sums = np.empty(max_segments * len(self.bands), dtype=np.float32)
        # weights over the central half, per decimated length m: (2 / nperseg)**2 /
        # hann**2 undoes the segment window and scales |fft|**2 to the envelope
        # squared; its square weights |fft|**4
        self._weights = {}
        for _, _, m in self._bins:
            if m not in self._weights:
                t = np.arange(m // 4, m // 4 + m // 2) / m
                w = 0.5 - 0.5 * np.cos(2.0 * np.pi * t)
                inv_w2 = (2.0 / nperseg) ** 2 / (w * w)
                self._weights[m] = (inv_w2.astype(np.float32), (inv_w2 * inv_w2).astype(np.float32))
        self._s2 = np.zeros(len(self.bands))
        self._s4 = np.zeros(len(self.bands))
        self._n = np.zeros(len(self.bands))

    def reset(self):
        """Start a new capture."""
        self._s2[:] = 0.0
        self._s4[:] = 0.0
        self._n[:] = 0.0

    def bin_range(self):
        """``(lo_bin, hi_bin)`` covering every candidate band: what :meth:`add` needs."""
        return (min(lo for lo, _, _ in self._bins), max(hi for _, hi, _ in self._bins))

    def add(self, spectra, offset=0):
        """Add one segment's spectrum, or several segments' at once.

        Parameters
        ----------
        spectra : ndarray, complex, 1-D or 2-D (segments, bins)
            Bins ``offset:offset + spectra.shape[-1]`` of the ``rfft`` of
            Hann-windowed segments (at most ``max_segments`` rows); must
            cover :meth:`bin_range`.
        offset : int, default 0
            The first bin held.

        Notes
        -----
        Each band's complex envelope is the band's analytic signal as in
        :func:`agent.dsp.envelope.band_analytic` (the conjugate band, a
        forward FFT).  Every band of one decimated length, of every segment
        given, is a row of one matrix transformed in one call (``scipy.fft``
        runs rows side by side); the weighted sums over each row's central
        half are two matrix-vector products.
        """
        spectra = spectra[None, :] if spectra.ndim == 1 else spectra
        segments = spectra.shape[0]
        lo_all, hi_all = self.bin_range()
        if offset > lo_all or offset + spectra.shape[1] < hi_all:
            raise ValueError(f"spectrum bins {offset}:{offset + spectra.shape[1]} do not cover "
                             f"the candidate bands' bins {lo_all}:{hi_all}")
        if not 1 <= segments <= self.max_segments:
            raise ValueError(f"{segments} segments given, at most {self.max_segments} allowed")
        for first, rows, m in self._groups:
            total = segments * rows
            z = self._zbuf[:total * m].reshape(total, m)
            z[:, self._pad_from[first]:] = 0.0  # only the padding: each row's bins are written below
            for seg in range(segments):
                for r in range(rows):
                    lo_bin, hi_bin, _ = self._bins[first + r]
                    np.conjugate(spectra[seg, lo_bin - offset:hi_bin - offset],
                                 out=z[seg * rows + r, :hi_bin - lo_bin])
            fft_inplace(z)
            # |z|**2 and |z|**4 over the whole matrix (contiguous: no numpy
            # buffer), then the weighted sums of each row's central half
            flat = z.reshape(-1)
            p = self._pbuf[:total * m]
            p2 = self._p2buf[:total * m]
            np.multiply(flat.real, flat.real, out=p)
            np.multiply(flat.imag, flat.imag, out=p2)
            p += p2
            np.multiply(p, p, out=p2)
            w, w_sq = self._weights[m]
            q, half = m // 4, m // 2
            sums = self._sums[:total]
            np.matmul(p.reshape(total, m)[:, q:q + half], w, out=sums)
            for seg in range(segments):
                self._s2[first:first + rows] += sums[seg * rows:(seg + 1) * rows]
            np.matmul(p2.reshape(total, m)[:, q:q + half], w_sq, out=sums)
            for seg in range(segments):
                self._s4[first:first + rows] += sums[seg * rows:(seg + 1) * rows]
            self._n[first:first + rows] += segments * half

    def kurtosis(self):
        """Spectral kurtosis of each band, ``n S4 / S2**2 - 2`` (0 for noise)."""
        with np.errstate(divide="ignore", invalid="ignore"):
            k = self._n * self._s4 / (self._s2 * self._s2) - 2.0
        return np.where(np.isfinite(k), k, -math.inf)

    def best(self):
        """The band of highest kurtosis.

        Returns
        -------
        lo_hz, hi_hz, kurtosis : float
        """
        k = self.kurtosis()
        i = int(np.argmax(k))
        lo, hi = self.bands[i]
        return lo, hi, float(k[i])
