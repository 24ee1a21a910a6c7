"""Overall levels of an acceleration signal, computed in one streaming pass.

- :class:`Moments`: running count, mean, central moments 2-4, min and max,
  merged block by block (no second pass, no growing memory).
- :func:`rms`, :func:`crest_factor`, :func:`kurtosis`: the same indicators
  for a whole array (reference and tests).

Conventions: RMS and peak are taken about the mean (an accelerometer channel
is AC-coupled, a DC offset is a sensor fault flagged elsewhere); kurtosis is
Pearson's (3 for a Gaussian signal, 1.5 for a sine); crest factor is peak over
RMS (sqrt(2) for a sine).
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["Moments", "rms", "crest_factor", "kurtosis"]

#: Largest squared ratio of a block's mean to its standard deviation for which
#: the block's central moments are taken from raw power sums (mean at most 0.1
#: sigma: the terms that convert raw to central sums are a few per cent of the
#: result, so the cancellation costs less than one digit).
RAW_SUMS_MAX_MEAN2 = 0.01


class Moments:
    """Running central moments of a signal fed in blocks.

    Parameters
    ----------
    max_block : int
        Largest block that :meth:`add` will be given; a scratch array of this
        size is allocated once.
    dtype : float32 or float64, default float64
        Type of the blocks :meth:`add` takes.  With ``float32`` the block's
        sums are taken in single precision (BLAS dot products, relative error
        about 1e-7 over a block of 32 768 samples) and merged in double
        precision; the pipeline uses it on the samples it casts for its FFT.

    Notes
    -----
    Blocks are merged with the pairwise update formulas for the second to
    fourth central moments ([1]_, [2]_), which stay accurate for long signals
    where summing raw powers would lose precision.  Within a block, raw power
    sums are used when the block's mean is small against its spread (the
    usual case for an AC-coupled accelerometer), and central sums otherwise.

    References
    ----------
    .. [1] T. F. Chan, G. H. Golub, R. J. LeVeque, "Updating formulae and a
       pairwise algorithm for computing sample variances", Stanford
       CS-TR-79-773, 1979.
    .. [2] P. Pebay, "Formulas for robust, one-pass parallel computation of
       covariances and arbitrary-order statistical moments", Sandia report
       SAND2008-6212, 2008, eq. (3.1)-(3.3).
    """

    def __init__(self, max_block, dtype=np.float64):
        if max_block < 1:
            raise ValueError(f"{max_block=} must be >= 1")
        self.dtype = np.dtype(dtype)
        if self.dtype not in (np.float32, np.float64):
            raise ValueError(f"{dtype=} must be float32 or float64")
        self._scratch = np.empty(max_block, dtype=self.dtype)
        self._scratch2 = np.empty(max_block, dtype=self.dtype)
        self._ones = np.ones(max_block, dtype=self.dtype)
        self.reset()

    def reset(self):
        """Forget everything fed so far."""
        self.n = 0
        self.mean = 0.0
        self.m2 = 0.0
        self.m3 = 0.0
        self.m4 = 0.0
        self.min = math.inf
        self.max = -math.inf
        self.last_sum = 0.0
        self.last_min = self.last_max = 0.0

    def add(self, x):
        """Merge a block of samples (1-D float array) into the moments.

        The block's sum, minimum and maximum stay available as ``last_sum``,
        ``last_min`` and ``last_max`` for checks that need them (the quality
        gate), so that nobody passes over the block again for them.
        """
        nb = x.shape[0]
        if nb == 0:
            return
        if nb > self._scratch.shape[0]:
            raise ValueError(f"block of {nb} samples is longer than max_block={self._scratch.shape[0]}")
        if x.dtype != self.dtype:
            raise ValueError(f"block of {x.dtype} given to moments of {self.dtype}")
        d2 = self._scratch2[:nb]
        self.last_sum = float(np.dot(x, self._ones[:nb]))  # BLAS: faster than a pairwise sum
        mean_b = self.last_sum / nb
        s2 = float(np.dot(x, x))
        if mean_b * mean_b <= RAW_SUMS_MAX_MEAN2 * max(s2 / nb - mean_b * mean_b, 0.0):
            # mean small against the spread (an AC-coupled sensor): central moments
            # from raw power sums about zero lose nothing and save a pass
            np.multiply(x, x, out=d2)
            s3 = float(np.dot(d2, x))
            s4 = float(np.dot(d2, d2))
            mu2 = mean_b * mean_b
            m2_b = s2 - nb * mu2
            m3_b = s3 - 3.0 * mean_b * s2 + 2.0 * nb * mu2 * mean_b
            m4_b = s4 - 4.0 * mean_b * s3 + 6.0 * mu2 * s2 - 3.0 * nb * mu2 * mu2
        else:
            d = self._scratch[:nb]
            np.subtract(x, mean_b, out=d)
            m2_b = float(np.dot(d, d))
            np.multiply(d, d, out=d2)
            m4_b = float(np.dot(d2, d2))
            m3_b = float(np.dot(d2, d))
        lo, hi = float(x.min()), float(x.max())
        self.last_min, self.last_max = lo, hi
        self.min = min(self.min, lo)
        self.max = max(self.max, hi)

        na, n = self.n, self.n + nb
        delta = mean_b - self.mean
        m2a, m3a = self.m2, self.m3
        self.m4 = (self.m4 + m4_b
                   + delta ** 4 * na * nb * (na * na - na * nb + nb * nb) / n ** 3
                   + 6.0 * delta ** 2 * (na * na * m2_b + nb * nb * m2a) / n ** 2
                   + 4.0 * delta * (na * m3_b - nb * m3a) / n)
        self.m3 = (m3a + m3_b
                   + delta ** 3 * na * nb * (na - nb) / n ** 2
                   + 3.0 * delta * (na * m2_b - nb * m2a) / n)
        self.m2 = m2a + m2_b + delta * delta * na * nb / n
        self.mean += delta * nb / n
        self.n = n

    @property
    def rms(self):
        """RMS about the mean (the standard deviation), in the signal's unit."""
        return math.sqrt(self.m2 / self.n) if self.n else 0.0

    @property
    def peak(self):
        """Largest absolute excursion from the mean."""
        if not self.n:
            return 0.0
        mean = min(max(self.mean, self.min), self.max)  # rounding may put it outside: 0 for a constant
        return max(self.max - mean, mean - self.min)

    @property
    def crest_factor(self):
        """Peak over RMS (dimensionless); 0 for a constant signal."""
        r = self.rms
        return self.peak / r if r > 0 else 0.0

    @property
    def kurtosis(self):
        """Pearson kurtosis ``n m4 / m2**2`` (3 for Gaussian); 0 if constant."""
        return self.n * self.m4 / (self.m2 * self.m2) if self.m2 > 0 else 0.0


def rms(x):
    """RMS of ``x`` about its mean.

    Parameters
    ----------
    x : array_like
        Samples, e.g. acceleration in m/s².

    Returns
    -------
    float
        In the unit of ``x``.
    """
    x = np.asarray(x, dtype=float)
    return float(np.sqrt(np.mean((x - x.mean()) ** 2)))


def crest_factor(x):
    """Peak (about the mean) over RMS; ``sqrt(2)`` for a sine."""
    x = np.asarray(x, dtype=float)
    d = x - x.mean()
    r = np.sqrt(np.mean(d * d))
    return float(np.max(np.abs(d)) / r) if r > 0 else 0.0


def kurtosis(x):
    """Pearson kurtosis of ``x``: 3 for Gaussian noise, 1.5 for a sine.

    Matches ``scipy.stats.kurtosis(x, fisher=False, bias=True)``.
    """
    x = np.asarray(x, dtype=float)
    d = x - x.mean()
    m2 = np.mean(d * d)
    return float(np.mean(d ** 4) / (m2 * m2)) if m2 > 0 else 0.0
