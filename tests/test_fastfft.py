"""The in-place single-precision FFTs against numpy's reference transforms."""

import numpy as np
import pytest

from agent.dsp.envelope import envelope_power, taper_squared, taper_squared_head
from agent.dsp.fastfft import RealSpectrum, fft_inplace

# float32 round-off of a transform, relative to its largest bin (about 1e-7
# per operation, growing like log2(n)): the limit used below
F32_REL = 2e-6


@pytest.mark.parametrize("n", [4, 6, 10, 1728, 6750, 65536])
def test_real_spectrum_equals_numpy_rfft(n):
    # reference library: numpy.fft.rfft in double precision; the half-length
    # complex FFT unpacking is Brigham 1988, "The Fast Fourier Transform and its
    # Applications", sec. 9.3
    x = np.random.default_rng(n).standard_normal(n).astype(np.float32)
    ref = np.fft.rfft(x.astype(np.float64))
    rs = RealSpectrum(n, n // 2 + 1)
    rs.buffer[:] = x
    rs.transform()
    h = n // 2
    for lo, hi in [(0, h + 1), (0, 2), (1, h), (h // 2, h + 1), (h, h + 1)]:
        out = rs.bins(lo, hi, np.empty(hi - lo, np.complex64))
        np.testing.assert_allclose(out, ref[lo:hi], rtol=0, atol=F32_REL * np.abs(ref).max())


@pytest.mark.parametrize("wanted", [1, 2, 3, 4])
def test_a_partial_batch_gives_the_rows_asked_for(wanted):
    # reference library: numpy.fft.rfft per row; the rows after the wanted ones
    # may be transformed as well (a whole SIMD group is faster than 2-3 rows)
    n = 2048
    x = np.random.default_rng(wanted).standard_normal((4, n)).astype(np.float32)
    rs = RealSpectrum(n, n // 2 + 1, rows=4)
    rs.buffers[:] = x
    rs.transform(wanted)
    for r in range(wanted):
        ref = np.fft.rfft(x[r].astype(np.float64))
        out = rs.bins(0, n // 2 + 1, np.empty(n // 2 + 1, np.complex64), row=r)
        np.testing.assert_allclose(out, ref, rtol=0, atol=F32_REL * np.abs(ref).max())


def test_rows_to_transform_rounds_up_to_whole_groups_of_four():
    from agent.dsp.fastfft import rows_to_transform
    assert [rows_to_transform(r, 4) for r in (1, 2, 3, 4)] == [1, 4, 4, 4]
    assert [rows_to_transform(r, 6) for r in (5, 6)] == [6, 6]
    assert rows_to_transform(5, 8) == 8


def test_real_spectrum_refuses_what_does_not_fit():
    rs = RealSpectrum(16, 4)
    with pytest.raises(ValueError, match="bins"):
        rs.bins(0, 5, np.empty(5, np.complex64))         # more than max_bins
    with pytest.raises(ValueError, match="bins"):
        rs.bins(6, 10, np.empty(4, np.complex64))        # beyond n // 2 + 1
    with pytest.raises(ValueError, match="even"):
        RealSpectrum(15, 4)


@pytest.mark.parametrize("dtype", [np.complex64, np.complex128])
def test_fft_inplace_equals_numpy_fft_and_writes_over_its_input(dtype):
    # reference library: numpy.fft.fft
    rng = np.random.default_rng(3)
    z = (rng.standard_normal(6912) + 1j * rng.standard_normal(6912)).astype(dtype)
    ref = np.fft.fft(z.astype(np.complex128))
    out = fft_inplace(z)
    assert out is z
    tol = F32_REL if dtype == np.complex64 else 1e-12
    np.testing.assert_allclose(z, ref, rtol=0, atol=tol * np.abs(ref).max())


def test_taper_head_is_the_dft_of_the_squared_hann():
    # reference library: numpy.fft.rfft; hann**2 = 3/8 - cos/2 + cos(2.)/8
    # (trigonometry, from memory) has DFT 3m/8, -m/4, m/16 and zeros
    for m in (6, 1080, 6750):
        ref = np.fft.rfft(taper_squared(m, np.empty(m)))
        np.testing.assert_allclose(taper_squared_head(m), ref[:3], atol=1e-9 * m)
        assert np.abs(ref[3:]).max() < 1e-9 * m


def test_envelope_power_equals_the_time_domain_recipe():
    # reference: the squared envelope's mean removed under the taper in the time
    # domain, then numpy.fft.rfft in double precision (Randall & Antoni 2011,
    # sec. 3.2: the squared envelope spectrum)
    m, k = 1080, 200
    rng = np.random.default_rng(5)
    z = (rng.standard_normal(m) + 1j * rng.standard_normal(m)).astype(np.complex64)
    taper = taper_squared(m, np.empty(m))
    sq = np.abs(z.astype(np.complex128)) ** 2
    sq -= taper * sq.sum() / taper.sum()
    ref = np.abs(np.fft.rfft(sq)[:k]) ** 2
    acc = np.zeros(k)
    envelope_power(z, taper_squared_head(m), RealSpectrum(m, k), np.empty(m, np.float32),
                   np.empty(k, np.complex64), acc)
    np.testing.assert_allclose(acc, ref, rtol=0, atol=1e-5 * ref.max())


@pytest.mark.parametrize("rows", [1, 2, 3, 4])
def test_envelope_power_rows_equals_single_segments(rows):
    # reference: band_analytic + envelope_power per segment, themselves checked
    # against scipy.signal.hilbert and numpy.fft.rfft; two real sequences in one
    # complex FFT: Brigham 1988, sec. 9.3
    from agent.dsp.envelope import band_analytic, envelope_power_rows, load_band
    nperseg, nb, m, k = 4096, 700, 1080, 300
    rng = np.random.default_rng(11 + rows)
    bands = [(rng.standard_normal(nb) + 1j * rng.standard_normal(nb)).astype(np.complex64) * 900
             for _ in range(rows)]
    ref = np.zeros(k)
    for band in bands:
        z = band_analytic(band, nperseg, 0, nb, np.empty(m, np.complex64))
        envelope_power(z, taper_squared_head(m), RealSpectrum(m, k), np.empty(m, np.float32),
                       np.empty(k, np.complex64), ref)
    z = np.full((4, m), np.nan, np.complex64)  # anything left in the scratch is overwritten
    w = np.full((2, m), np.nan, np.complex64)
    for r, band in enumerate(bands):
        load_band(band, nperseg, z[r])
    acc = np.zeros(k)
    envelope_power_rows(z, rows, nb, taper_squared_head(m), w, np.empty(m, np.float32), acc)
    np.testing.assert_allclose(acc[1:], ref[1:], rtol=0, atol=1e-5 * ref.max())
    assert abs(acc[0]) <= 1e-5 * ref.max()
    with pytest.raises(ValueError):
        envelope_power_rows(z, 5, nb, taper_squared_head(m), w, np.empty(m, np.float32), acc)


def test_fast_length_is_the_smallest_5_smooth_multiple():
    # reference: the definition, by brute force (a length whose prime factors
    # are 2, 3 and 5 only, a multiple of the step, at least n)
    from agent.dsp.fastfft import fast_length

    def smooth(m):
        for p in (2, 3, 5):
            while m % p == 0:
                m //= p
        return m == 1

    for multiple in (1, 2, 4):
        for n in list(range(1, 300)) + [5461, 6563, 8193]:
            want = next(m for m in range(n, 4 * n + 8) if m % multiple == 0 and smooth(m))
            assert fast_length(n, multiple) == want, (n, multiple)
