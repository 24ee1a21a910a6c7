"""The fixed-memory analysis of one measurement point.

:class:`Pipeline` owns every work array of the analysis, allocated once when
it is built.  A capture streams through it in blocks of any size
(:meth:`Pipeline.feed`), is cut into Hann-windowed segments with 50 % overlap,
and each segment's single FFT serves everything:

- the Welch average of the acceleration power spectrum (velocity RMS in the
  ISO band, the shaft speed);
- on the first segments, the spectral kurtosis of candidate bands (when the
  demodulation band is chosen automatically); these segments' candidate bins
  are kept in a fixed look-ahead store and replayed once the band is chosen;
- the squared-envelope power spectrum of the demodulation band, averaged.

Samples are cast to float32 as they arrive (a 16- or 24-bit converter's
values are exact in float32) and kept in two half-segment buffers used in
turn (no copy on each hop).  Levels (RMS, peak, crest factor, kurtosis) and
the quality gate see every sample once, half a segment at a time; block sums
are merged in float64.
The segment FFT runs in single precision, in place, and only the bins used
(the low bins and the band) are unpacked (:mod:`agent.dsp.fastfft`); all
averages are float64.  :meth:`Pipeline.finish` turns the averages into an
:class:`Analysis`.  Nothing is allocated per segment: memory does not grow
with the capture length or the number of captures.

Public API
----------
- :func:`plan_segment(fs, capture_s, point)` -> ``nperseg``.
- :class:`Pipeline(point, sample_rate_hz, capture_s, ...)`: ``start()``,
  ``feed(block)``, ``finish(extra_flags)`` -> :class:`Analysis`,
  ``analyze(x)`` (a whole array, for tests and tools).
- :class:`Analysis`: ``to_dict()``, ``envelope_spectrum()``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from agent.dsp.bearing import defect_frequencies_hz
from agent.dsp.envelope import (envelope_amplitude, envelope_power_rows, load_band,
                                 taper_squared_head)
from agent.dsp.fastfft import RealSpectrum, fast_length
from agent.dsp.iso import iso_zone, velocity_band_hz
from agent.dsp.kurtogram import BandKurtosis, candidate_bands
from agent.dsp.levels import Moments
from agent.dsp.quality import QualityGate
from agent.dsp.spectrum import hann, psd_scale, velocity_rms_mm_s
from agent.dsp.speed import refine_shaft_hz
from agent.findings import count_harmonics, judge, search_defect, shaft_lines, summary_sentence

__all__ = ["Pipeline", "Analysis", "plan_segment"]

#: Segments whose spectra are kept for the automatic band choice.
LOOKAHEAD_SEGMENTS = 2
#: Segments windowed into one batch and transformed together (scipy.fft runs
#: the rows of a batch side by side in SIMD: 2.2x faster per segment).
BATCH_SEGMENTS = 4
#: Segments whose envelopes are computed together (their bands in one FFT,
#: their squared envelopes two to a row in another; four rows cost little
#: more than two).  Even.
ENVELOPE_SEGMENTS = 4
#: Lowest and highest edge of an automatically chosen band, relative limits.
AUTO_BAND_LOW_HZ = 500.0
AUTO_BAND_TOP = 0.45  # of the sample rate: clear of the anti-alias filter
MIN_NPERSEG = 4096


def _pow2_floor(n):
    return 1 << (int(n).bit_length() - 1)


def _pow2_ceil(n):
    return 1 << int(math.ceil(n) - 1).bit_length()


def _env_len(nb, env_bins):
    """Length of the band's inverse FFT: the squared envelope of ``nb`` bins
    reaches ``nb`` bins; with ``m >= nb + env_bins`` its aliases fold above
    ``env_bins``, so the analysed part stays clean (and ``m // 2 + 1`` holds
    ``env_bins``).  The smallest such length with small prime factors (a
    6912-point transform is 1.4 times faster than an 8192-point one)."""
    return fast_length(max(nb + env_bins, 2 * env_bins, 8))


def plan_segment(fs, capture_s, point):
    """Segment length for a point: fine enough to separate sidebands.

    Parameters
    ----------
    fs : float
        Sample rate in Hz.
    capture_s : float
        Capture length in s.
    point : PointSettings

    Returns
    -------
    int
        A power of two: the resolution asked for in ``point.envelope``, or
        the smaller of 1 Hz and a sixth of the cage rate (so FTF sidebands
        around 2xBSF are resolved), limited so that a capture holds at least
        three segments, and never below ``MIN_NPERSEG``.
    """
    if point.envelope.resolution_hz > 0:
        target = point.envelope.resolution_hz
    else:
        ftf_hz = point.bearing.orders.ftf * point.machine.shaft_hz
        target = min(1.0, ftf_hz / 6.0)
    n = _pow2_ceil(fs / target)
    cap = _pow2_floor(max(fs * capture_s / 2.0, MIN_NPERSEG))
    return max(min(n, cap), MIN_NPERSEG)


@dataclass(frozen=True)
class Analysis:
    """The result of one capture of one point (see :meth:`to_dict`)."""

    point: str
    capture_s: float
    sample_rate_hz: float
    levels: dict
    shaft_hz: float
    shaft_hz_nominal: float
    speed_source: str
    envelope: dict
    quality: tuple
    defects: dict
    findings: tuple
    summary: str
    _spectrum: tuple = field(default=(None, None), repr=False, compare=False)

    @property
    def flagged(self):
        """True when the capture failed the quality gate."""
        return bool(self.quality)

    def envelope_spectrum(self):
        """``(freqs_hz, amplitude)`` of the averaged squared-envelope spectrum."""
        return self._spectrum

    def to_dict(self):
        """The analysis JSON (the ``analyze --json`` output and the result body)."""
        return {
            "point": self.point,
            "capture_s": self.capture_s,
            "sample_rate_hz": self.sample_rate_hz,
            "levels": dict(self.levels),
            "shaft_hz": self.shaft_hz,
            "shaft_hz_nominal": self.shaft_hz_nominal,
            "speed_source": self.speed_source,
            "envelope": dict(self.envelope),
            "quality": list(self.quality),
            "defects": {k: dict(v) for k, v in self.defects.items()},
            "findings": [dict(f) for f in self.findings],
            "summary": self.summary,
        }


class Pipeline:
    """Streaming, fixed-memory analysis of one measurement point.

    Parameters
    ----------
    point : PointSettings
        Machine, bearing, envelope settings of the point.
    sample_rate_hz : float
        Sample rate of the signal.
    capture_s : float
        Nominal capture length; sets the segment length (see
        :func:`plan_segment`).  Longer or shorter captures still work.
    full_scale_m_s2 : float, optional
        Acceleration at the converter's full scale, for the clipping check.
    lowest_trusted_hz : float, default 0.0
        Lowest frequency the input can see; raises the velocity band's lower
        edge.
    """

    def __init__(self, point, sample_rate_hz, capture_s, full_scale_m_s2=None,
                 lowest_trusted_hz=0.0):
        fs = float(sample_rate_hz)
        if not fs >= 1000:
            raise ValueError(f"{sample_rate_hz=} must be at least 1000 Hz")
        if not capture_s > 0:
            raise ValueError(f"{capture_s=} must be positive")
        self.point = point
        self.fs = fs
        self.capture_s = float(capture_s)
        self.nperseg = plan_segment(fs, capture_s, point)
        self.hop = self.nperseg // 2
        self.df_hz = fs / self.nperseg
        self.nbins = self.nperseg // 2 + 1
        self.lowest_trusted_hz = float(lowest_trusted_hz)

        # Frequencies the envelope spectrum has to hold: every harmonic searched,
        # at the fastest speed allowed, plus room for sidebands and the floor.
        m = point.machine
        fastest = m.shaft_hz * (1.0 + m.speed_search)
        top_order = max(point.bearing.orders.bpfi, 2.0 * point.bearing.orders.bsf,
                        point.bearing.orders.bpfo)
        self.env_max_hz = (point.envelope.harmonics + 0.5) * top_order * fastest * (
            1.0 + point.envelope.tolerance) + 1.5 * fastest
        if self.env_max_hz >= AUTO_BAND_TOP * fs:
            raise ValueError(
                f"{sample_rate_hz=} is too low for point {point.name!r}: the envelope spectrum must "
                f"reach {self.env_max_hz:.0f} Hz; lower envelope.harmonics or raise the sample rate")
        self.env_bins = int(math.ceil(self.env_max_hz / self.df_hz)) + 1

        if point.envelope.band_hz is not None:
            lo_hz, hi_hz = point.envelope.band_hz
            if hi_hz >= fs / 2:
                raise ValueError(f"envelope band {point.envelope.band_hz} must lie below fs/2 = {fs / 2}")
            self.bands = [(lo_hz, hi_hz)]
            self.band_source = "config"
        else:
            self.bands = candidate_bands(fs, self.env_max_hz, AUTO_BAND_LOW_HZ, AUTO_BAND_TOP * fs)
            if not self.bands:
                raise ValueError(f"no demodulation band of at least {self.env_max_hz:.0f} Hz fits "
                                 f"between {AUTO_BAND_LOW_HZ:g} Hz and {AUTO_BAND_TOP * fs:.0f} Hz")
            self.band_source = "auto"

        widest = max(self._band_bins(b)[1] - self._band_bins(b)[0] for b in self.bands)
        m_max = _env_len(widest, self.env_bins)
        self._kurt = (BandKurtosis(fs, self.nperseg, self.bands, max_segments=LOOKAHEAD_SEGMENTS)
                      if self.band_source == "auto" else None)
        # PSD bins needed: the velocity band and the shaft-speed search
        self.psd_bins = min(self.nbins, int(math.ceil(max(1000.0, 1.6 * fastest) / self.df_hz)) + 2)

        # --- work arrays, allocated once -------------------------------------------------
        window = hann(self.nperseg)
        self._scale = psd_scale(window, fs)
        # the window's two halves, applied to the two half-segment buffers
        self._w_first = window[:self.hop].astype(np.float32)
        self._w_second = window[self.hop:].astype(np.float32)
        # rfft(hann) is nperseg/2 at bin 0 and -nperseg/4 at bin 1, zero elsewhere:
        # removing a segment's mean is a correction of those two bins
        self._hann_head = np.array([self.nperseg / 2.0, -self.nperseg / 4.0])
        # samples are cast to float32 as they arrive, into two half-segment
        # buffers used in turn: a segment is the previous half and this one
        self._halves = np.zeros((2, self.hop), dtype=np.float32)
        self._half_sums = [0.0, 0.0]
        # bins the look-ahead store keeps: every candidate band
        if self._kurt is not None:
            self._cand_lo, self._cand_hi = self._kurt.bin_range()
        else:
            self._cand_lo, self._cand_hi = self._band_bins(self.bands[0])
        self._rs = RealSpectrum(self.nperseg, max(self.psd_bins, self._cand_hi - self._cand_lo),
                                rows=BATCH_SEGMENTS)
        self._batch_means = [0.0] * BATCH_SEGMENTS
        self._low = np.empty(self.psd_bins, dtype=np.complex64)
        self._band_spec = np.empty(widest, dtype=np.complex64)
        self._pw = np.empty(self.psd_bins, dtype=np.float32)
        self._pw2 = np.empty(self.psd_bins, dtype=np.float32)
        self._pw64 = np.empty(self.psd_bins)
        self._psd_acc = np.zeros(self.psd_bins)
        self._psd = np.empty(self.psd_bins)
        self._store = np.empty((LOOKAHEAD_SEGMENTS if self._kurt is not None else 0,
                                self._cand_hi - self._cand_lo), dtype=np.complex64)
        # envelopes are computed ENVELOPE_SEGMENTS at a time: the bands wait in
        # the rows of one matrix, shaped for the chosen band's envelope length
        self._m_max = m_max
        self._env_zbuf = np.empty(ENVELOPE_SEGMENTS * m_max, dtype=np.complex64)
        self._env_wbuf = np.empty(ENVELOPE_SEGMENTS // 2 * m_max, dtype=np.complex64)
        self._tmp = np.empty(m_max, dtype=np.float32)
        # the squared taper's DFT bins, per distinct envelope length (a handful at most)
        self._taper_heads = {}
        for band in self.bands:
            lo_bin, hi_bin = self._band_bins(band)
            length = min(_env_len(hi_bin - lo_bin, self.env_bins), m_max)
            self._taper_heads.setdefault(length, taper_squared_head(length))
        self._env_acc = np.zeros(self.env_bins)
        self._env_amp = np.empty(self.env_bins)
        self._env_freqs = np.arange(self.env_bins) * self.df_hz
        self._env_freqs.flags.writeable = False
        self._moments = Moments(self.hop, dtype=np.float32)
        self._gate = QualityGate(self.hop, full_scale_m_s2, dtype=np.float32)
        lo_v, hi_v = velocity_band_hz(m.shaft_hz, self.lowest_trusted_hz)
        self.velocity_band_hz = (lo_v, min(hi_v, 0.45 * fs))
        k_lo = int(math.ceil(self.velocity_band_hz[0] / self.df_hz))
        k_hi = int(math.floor(self.velocity_band_hz[1] / self.df_hz)) + 1
        f = np.arange(k_lo, k_hi) * self.df_hz
        self._vel_weight = 1.0 / (2.0 * np.pi * f) ** 2
        self.start()

    # ------------------------------------------------------------------ helpers
    def _band_bins(self, band):
        lo_bin = max(int(round(band[0] / self.df_hz)), 1)
        hi_bin = min(int(round(band[1] / self.df_hz)), self.nbins)
        return lo_bin, hi_bin

    def _select_band(self, band):
        self.band = band
        lo_bin, hi_bin = self._band_bins(band)
        self._lo_bin, self._hi_bin = lo_bin, hi_bin
        m = min(_env_len(hi_bin - lo_bin, self.env_bins), self._m_max)
        self._env_z = self._env_zbuf[:ENVELOPE_SEGMENTS * m].reshape(ENVELOPE_SEGMENTS, m)
        self._env_w = self._env_wbuf[:ENVELOPE_SEGMENTS // 2 * m].reshape(ENVELOPE_SEGMENTS // 2, m)
        self._taper_head = self._taper_heads[m]
        self._taper_sum = float(self._taper_head[0].real)
        # the squared envelope of a band B Hz wide holds nothing above B: a
        # configured band narrower than the harmonics sought leaves the top of
        # the envelope spectrum empty, where ratios of rounding noise are no SNR
        self._env_usable = min(self.env_bins, hi_bin - lo_bin + 1)

    # ------------------------------------------------------------------ streaming
    def start(self):
        """Begin a new capture (forget the previous one; nothing is reallocated)."""
        self._fill = 0
        self._batched = 0    # windowed segments waiting in the batch
        self._half = 0       # the half being filled
        self._have_first = False  # the other half holds the first half of a segment
        self._segments = 0
        self._env_segments = 0
        self._env_rows = 0   # bands waiting in the envelope matrix
        self._stored = 0
        self._psd_acc[:] = 0.0
        self._env_acc[:] = 0.0
        self._moments.reset()
        self._gate.reset()
        self.band_kurtosis = None
        if self._kurt is not None:
            self._kurt.reset()
            self.band = None
        else:
            self._select_band(self.bands[0])

    def feed(self, block):
        """Stream a block of acceleration samples (1-D, m/s²) into the capture."""
        with np.errstate(invalid="ignore", over="ignore"):  # NaN/inf: flagged by the gate
            self._feed(np.asarray(block, dtype=float))

    def _feed(self, block):
        if block.ndim != 1:
            raise ValueError(f"block must be 1-D, got shape {block.shape}")
        pos = 0
        n = block.shape[0]
        hop = self.hop
        while pos < n:
            take = min(n - pos, hop - self._fill)
            self._halves[self._half, self._fill:self._fill + take] = block[pos:pos + take]
            self._fill += take
            pos += take
            if self._fill == hop:
                self._half_done(hop)

    def _levels(self, n):
        """Levels and quality gate of the first ``n`` samples of the half being
        filled: every sample is seen once, half a segment at a time."""
        part = self._halves[self._half, :n]
        mom = self._moments
        mom.add(part)
        self._gate.add(part, mom.last_min, mom.last_max)

    def _half_done(self, n):
        cur = self._half
        self._levels(n)
        self._half_sums[cur] = self._moments.last_sum
        if self._have_first:
            self._window(1 - cur, cur)
        self._have_first = True
        self._half = 1 - cur
        self._fill = 0

    def _window(self, first, second):
        """Window the segment made of two halves into the next batch row."""
        hop = self.hop
        r = self._batched
        row = self._rs.buffers[r]
        np.multiply(self._halves[first], self._w_first, out=row[:hop])
        np.multiply(self._halves[second], self._w_second, out=row[hop:])
        self._batch_means[r] = (self._half_sums[first] + self._half_sums[second]) / self.nperseg
        self._batched = r + 1
        if self._batched == BATCH_SEGMENTS:
            self._flush_batch()

    def _flush_batch(self):
        """Transform the waiting segments together, then use each one's bins."""
        count = self._batched
        if not count:
            return
        self._rs.transform(count)
        self._batched = 0
        for r in range(count):
            self._segment(r)

    def _segment(self, r):
        rs = self._rs
        mean = self._batch_means[r]
        low = self._remove_mean(rs.bins(0, self.psd_bins, self._low, r), 0, mean)
        np.multiply(low.real, low.real, out=self._pw)
        np.multiply(low.imag, low.imag, out=self._pw2)
        self._pw += self._pw2
        self._pw64[:] = self._pw
        self._psd_acc += self._pw64
        self._segments += 1
        if self.band is None:
            self._remove_mean(rs.bins(self._cand_lo, self._cand_hi, self._store[self._stored], r),
                              self._cand_lo, mean)
            self._stored += 1
            if self._stored == LOOKAHEAD_SEGMENTS:
                self._choose_band()
        else:
            nb = self._hi_bin - self._lo_bin
            band = rs.bins(self._lo_bin, self._hi_bin, self._band_spec[:nb], r)
            self._envelope(self._remove_mean(band, self._lo_bin, mean))

    def _remove_mean(self, spec, first_bin, mean):
        """Subtract the segment's mean from bins 0 and 1 where ``spec`` holds them
        (``rfft(mean * hann)`` is non-zero there only)."""
        for k in (0, 1):
            i = k - first_bin
            if 0 <= i < spec.shape[0]:
                spec[i] -= mean * self._hann_head[k]
        return spec

    def _choose_band(self):
        self._kurt.add(self._store[:self._stored], offset=self._cand_lo)
        lo, hi, k = self._kurt.best()
        self.band_kurtosis = k
        self._select_band((lo, hi))
        a = self._lo_bin - self._cand_lo
        b = self._hi_bin - self._cand_lo
        for i in range(self._stored):
            self._envelope(self._store[i, a:b])
        self._stored = 0

    def _envelope(self, band):
        """One segment's band bins: loaded into the envelope matrix, whose rows
        are transformed together once it is full."""
        load_band(band, self.nperseg, self._env_z[self._env_rows])
        self._env_rows += 1
        if self._env_rows == ENVELOPE_SEGMENTS:
            self._flush_envelopes()

    def _flush_envelopes(self):
        rows = self._env_rows
        if not rows:
            return
        envelope_power_rows(self._env_z, rows, self._hi_bin - self._lo_bin, self._taper_head,
                            self._env_w, self._tmp, self._env_acc)
        self._env_segments += rows
        self._env_rows = 0

    # ------------------------------------------------------------------ result
    def finish(self, extra_flags=()):
        """End the capture and compute the :class:`Analysis` (see :meth:`_finish`)."""
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            return self._finish(extra_flags)

    def _finish(self, extra_flags=()):
        """End the capture and compute the :class:`Analysis`.

        Parameters
        ----------
        extra_flags : iterable of str
            Flags raised by the acquisition (``"overrun"``, ``"wrong_rate"``).
        """
        if self._fill:  # the samples after the last whole half-segment
            self._levels(self._fill)
            self._fill = 0
        self._flush_batch()
        if self.band is None and self._stored:
            self._choose_band()
        self._flush_envelopes()  # the segments left over
        mom = self._moments
        flags = self._gate.flags(mom.mean, mom.rms, mom.max - mom.min if mom.n else 0.0,
                                 self.nperseg)
        for f in extra_flags:
            if f not in flags:
                flags.append(f)
        p = self.point
        nominal = p.machine.shaft_hz
        levels = {
            "accel_rms_m_s2": mom.rms,
            "accel_peak_m_s2": mom.peak,
            "crest_factor": mom.crest_factor,
            "kurtosis": mom.kurtosis,
            "velocity_rms_mm_s": None,
            "velocity_band_hz": list(self.velocity_band_hz),
            "iso_zone": None,
            "iso_group": p.machine.iso_group,
            "support": p.machine.support,
        }
        shaft_hz, speed_source = nominal, "nominal"
        defects = {}
        spectrum = (None, None)
        band = list(self.band) if self.band is not None else None
        if self._segments and "nonfinite" not in flags:
            psd = self._psd
            np.multiply(self._psd_acc, self._scale / self._segments, out=psd)
            psd[0] *= 0.5
            if self.psd_bins == self.nbins:
                psd[-1] *= 0.5
            k_lo = int(math.ceil(self.velocity_band_hz[0] / self.df_hz))
            vel = velocity_rms_mm_s(psd, self.df_hz, *self.velocity_band_hz,
                                    weight=self._vel_weight[:max(psd.shape[0] - k_lo, 0)])
            levels["velocity_rms_mm_s"] = vel
            if math.isfinite(vel):
                levels["iso_zone"] = iso_zone(vel, p.machine.iso_group, p.machine.support)
            shaft_hz, speed_source = refine_shaft_hz(psd, self.df_hz, nominal, p.machine.speed_search)
            if self._env_segments:
                amp = envelope_amplitude(self._env_acc, self._env_segments, self._taper_sum,
                                         self._env_amp)
                defects = self._defects(amp[:self._env_usable], shaft_hz)
                spectrum = (self._env_freqs, amp.copy())  # the result outlives this capture
        findings = judge(defects, flagged=bool(flags)) if defects else []
        return Analysis(
            point=p.name,
            capture_s=mom.n / self.fs,
            sample_rate_hz=self.fs,
            levels=levels,
            shaft_hz=shaft_hz,
            shaft_hz_nominal=nominal,
            speed_source=speed_source,
            envelope={"band_hz": band, "band_source": self.band_source,
                      "band_kurtosis": self.band_kurtosis, "resolution_hz": self.df_hz,
                      "segments": self._env_segments},
            quality=tuple(flags),
            defects={k: _public(v) for k, v in defects.items()},
            findings=tuple(findings),
            summary=summary_sentence(findings, {k for k, ev in defects.items()
                                                if not ev.get("sidebands_resolved", True)}),
            _spectrum=spectrum,
        )

    def _defects(self, amp, shaft_hz):
        p = self.point
        freqs = defect_frequencies_hz(p.bearing.orders, shaft_hz)
        plan = {"bpfo": (freqs["bpfo"], shaft_hz), "bpfi": (freqs["bpfi"], shaft_hz),
                "bsf": (freqs["bsf2"], freqs["ftf"]), "ftf": (freqs["ftf"], None)}
        out = {}
        for key, (f0, fm) in plan.items():
            out[key] = search_defect(amp, self.df_hz, f0, p.envelope.harmonics,
                                     p.envelope.tolerance, modulation_hz=fm)
        out["bsf"]["spin_hz"] = freqs["bsf"]
        return count_harmonics(out, shaft_hz, self.df_hz,
                               standing_shaft=shaft_lines(amp, self.df_hz, shaft_hz), amp=amp)

    def analyze(self, x, extra_flags=()):
        """Analyse a whole array (m/s²) as one capture."""
        self.start()
        self.feed(x)
        return self.finish(extra_flags)


def _public(ev):
    keep = ("expected_hz", "found_hz", "amplitude", "snr_db", "harmonics", "searched",
            "sideband_ratio", "modulation_hz", "spin_hz", "same_line_as", "same_line_harmonic")
    return {k: ev[k] for k in keep if k in ev}
