"""Signal-quality gate: is a capture fit to be judged at all?

:class:`QualityGate` watches the samples as they stream through the pipeline
and, at the end of a capture, returns the flags that make the capture unfit:

- ``"nonfinite"``: NaN or infinity in the data, or values beyond
  ``MAX_VALID_M_S2`` that no accelerometer delivers (a scaling mistake);
- ``"clipped"``: the converter's full scale was reached (or, with no known
  full scale, the signal sits flat at its extreme value);
- ``"flat"``: the sensor is silent, disconnected or stuck (RMS below a floor,
  or no variation at all);
- ``"dc_offset"``: a large constant offset (an accelerometer input is
  AC-coupled; an offset means a failing sensor, cable or bias supply);
- ``"too_short"``: less signal than one analysis segment;
- ``"overrun"`` and ``"wrong_rate"`` are added by the acquisition.

A flagged capture is still published with its levels and flags, but it never
yields a bearing finding and never changes an alert state.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["QualityGate", "FLAGS"]

FLAGS = ("nonfinite", "clipped", "flat", "dc_offset", "too_short", "overrun", "wrong_rate")

#: Larger magnitudes are not acceleration (about 100 000 g, beyond any
#: accelerometer): a units or scaling mistake, treated like non-finite data.
#: It also keeps the float32 analysis (fourth powers of half a segment) far
#: from overflow.
MAX_VALID_M_S2 = 1e6
#: Share of the samples at full scale above which a capture counts as clipped.
CLIP_SHARE = 1e-4
#: Without a known full scale: repeated extreme values counted as a flat top.
FLAT_TOP_MIN = 8
#: Below this RMS (m/s²) no real running machine is being measured.
FLAT_RMS_M_S2 = 1e-3
#: Relative to full scale, the converter's own noise (-80 dBFS).
FLAT_RMS_FS = 1e-4
#: An offset larger than this many RMS, and than DC_FS of full scale.
DC_RMS_RATIO = 3.0
DC_FS = 0.05


class QualityGate:
    """Streaming quality checks of one capture.

    Parameters
    ----------
    max_block : int
        Largest block given to :meth:`add` (scratch allocated once).
    full_scale_m_s2 : float, optional
        Acceleration at the converter's full scale.  ``None`` for recordings
        stored in m/s² with no known full scale: clipping is then recognised
        by a flat top, the same extreme value repeated.
    dtype : float32 or float64, default float64
        Type of the blocks given to :meth:`add` (the scratch matches it, so
        that no conversion is needed).
    """

    def __init__(self, max_block, full_scale_m_s2=None, dtype=np.float64):
        if full_scale_m_s2 is not None and not full_scale_m_s2 > 0:
            raise ValueError(f"{full_scale_m_s2=} must be positive or None")
        self.full_scale_m_s2 = full_scale_m_s2
        self._abs = np.empty(max_block, dtype=dtype)
        self._mask = np.empty(max_block, dtype=bool)
        self.reset()

    def reset(self):
        """Start a new capture."""
        self.n = 0
        self.nonfinite = False
        self.at_full_scale = 0
        self.extreme = 0.0
        self.at_extreme = 0

    def add(self, x, block_min=None, block_max=None):
        """Inspect a block of samples in m/s².

        Parameters
        ----------
        x : ndarray
            The block.
        block_min, block_max : float, optional
            The block's minimum and maximum when the caller has them already:
            the block is then only read again when it reaches full scale or
            its running extreme, which is rare.  NaN or infinity in the block
            shows in them (``numpy.min`` propagates NaN).
        """
        nb = x.shape[0]
        if nb == 0:
            return
        self.n += nb
        if block_min is None:
            block_min, block_max = float(x.min()), float(x.max())
        if not (math.isfinite(block_min) and math.isfinite(block_max)) \
                or max(-block_min, block_max) > MAX_VALID_M_S2:
            self.nonfinite = True
            return
        peak = max(-block_min, block_max)
        fs = self.full_scale_m_s2
        near_fs = fs is not None and peak >= 0.999 * fs
        if peak < self.extreme and not near_fs:
            return
        a = self._abs[:nb]
        mask = self._mask[:nb]
        np.abs(x, out=a)
        if near_fs:
            np.greater_equal(a, 0.999 * fs, out=mask)
            self.at_full_scale += int(np.count_nonzero(mask))
        if peak >= self.extreme:
            np.equal(a, peak, out=mask)
            count = int(np.count_nonzero(mask))
            if peak > self.extreme:
                self.extreme, self.at_extreme = peak, count
            else:
                self.at_extreme += count

    def flags(self, mean, rms, peak_to_peak, min_samples):
        """Flags of the capture.

        Parameters
        ----------
        mean, rms : float
            Mean and RMS (about the mean) of the capture, m/s².
        peak_to_peak : float
            Largest minus smallest sample, m/s².
        min_samples : int
            Samples needed for one analysis segment.

        Returns
        -------
        list of str
        """
        out = []
        if self.nonfinite:
            return ["nonfinite"]
        if self.n < min_samples:
            out.append("too_short")
        if self.full_scale_m_s2 is not None:
            if self.at_full_scale > max(CLIP_SHARE * self.n, 1):
                out.append("clipped")
        elif self.at_extreme >= max(FLAT_TOP_MIN, CLIP_SHARE * self.n) and self.extreme > 0:
            out.append("clipped")
        floor = FLAT_RMS_M_S2
        if self.full_scale_m_s2 is not None:
            floor = max(floor, FLAT_RMS_FS * self.full_scale_m_s2)
        if peak_to_peak == 0.0 or rms < floor:
            out.append("flat")
        dc_limit = DC_RMS_RATIO * rms
        if self.full_scale_m_s2 is not None:
            dc_limit = max(dc_limit, DC_FS * self.full_scale_m_s2)
        if abs(mean) > dc_limit and "flat" not in out:
            out.append("dc_offset")
        return out
