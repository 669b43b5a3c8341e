"""Time delay: sub-sample peak without parabola bias, standard error against the Cramer-Rao bound
and the scatter across windows, PHAT against plain correlation on a narrow-band source."""
import numpy as np
import pytest

from corrtransforms.correlation import correlate_block
from corrtransforms.record_error import bartlett_stderr
from corrtransforms.time_delay import estimate_lag, refine_peak
from tests.indicator_fixtures import simulate_sdof

FS = 100.0


def _parabola(v, k):
    """Three-point parabola through the peak sample (the biased interpolator)."""
    y0, y1, y2 = v[k - 1], v[k], v[k + 1]
    return k + 0.5 * (y0 - y2) / (y0 - 2 * y1 + y2)


def test_band_limited_refinement_has_no_parabola_bias():
    # correlation of band-limited white noise (0..B) delayed by D: sinc(2B(tau - D))
    # (Bendat & Piersol, Random Data, Sec. 5.2, from memory); B = 0.4 fs: a sharp peak
    lags = np.arange(-200, 201)
    parabola, ours = [], []
    for offset in np.linspace(0.05, 0.95, 19):
        v = np.sinc(0.8 * (lags - offset))
        k = int(np.argmax(v))
        parabola.append(_parabola(v, k) + lags[0] - offset)
        ours.append(refine_peak(v, k)[0] + lags[0] - offset)
    # the parabola is biased towards the nearest sample by about a tenth of a sample
    # (Jacovitti & Scarano 1993); the band-limited interpolation is not
    assert np.max(np.abs(parabola)) > 0.05
    assert np.max(np.abs(ours)) < 0.002


def _flat_band_pair(rng, n, band_hz, delay_s, snr):
    f = np.fft.rfftfreq(n, 1 / FS)
    keep = f <= band_hz

    def flat(x):
        return np.fft.irfft(np.fft.rfft(x) * keep, n)

    source = flat(rng.standard_normal(n))
    delayed = np.fft.irfft(np.fft.rfft(source) * np.exp(-2j * np.pi * f * delay_s), n)
    a = source + flat(rng.standard_normal(n)) / np.sqrt(snr)
    b = delayed + flat(rng.standard_normal(n)) / np.sqrt(snr)
    return np.column_stack([a, b])


def _lag_of(values, max_lag_s, weighting="none"):
    est = correlate_block(values, FS, max_lag_s, pairs="all")
    L = est.max_lag
    aa, bb, ab = (est.coefficient[est.pair_index(*p)] for p in ((0, 0), (1, 1), (0, 1)))
    se = bartlett_stderr(ab, aa, bb, est.pair_count[est.pair_index(0, 1)])
    weighted = None
    if weighting != "none":
        w = correlate_block(values, FS, max_lag_s, pairs=[(0, 1)], weighting=weighting)
        weighted = w.coefficient[0]
    return estimate_lag(ab, se, -L / FS, 1 / FS, len(values) / FS, weighted_coefficient=weighted,
                        weighting=weighting, auto_a=aa[L:], auto_b=bb[L:])


@pytest.mark.parametrize("snr", [100.0, 4.0, 1.0])
def test_delayed_noise_lag_stderr_against_scatter_and_cramer_rao(snr):
    # flat band 0..B, delay 12.34 samples, equal SNR at both sensors: coherence g = SNR/(1+SNR)
    band, delay, n, windows = 20.0, 0.1234, 6000, 30
    rng = np.random.default_rng(int(snr))
    results = [_lag_of(_flat_band_pair(rng, n, band, delay, snr), 1.0) for _ in range(windows)]
    lags = np.array([r.lag_s for r in results])
    stderr = np.median([r.lag_stderr_s for r in results])
    g = snr / (1 + snr)
    # Cramer-Rao bound for a flat band (Knapp & Carter 1976; Carter 1987):
    # var = 3 (1 - g^2) / (8 pi^2 g^2 B^3 T)
    crb = np.sqrt(3 * (1 - g ** 2) / (8 * np.pi ** 2 * g ** 2 * band ** 3 * n / FS))
    assert abs(np.mean(lags) - delay) * FS < 0.1  # within a tenth of a sample
    assert 1 / 1.5 < np.std(lags, ddof=1) / stderr < 1.5
    assert stderr == pytest.approx(crb, rel=0.2)
    assert np.mean([r.peak_coef for r in results]) == pytest.approx(g, abs=0.03)
    assert all(r.quality == () for r in results)


def test_lag_sign_convention_b_lags_a():
    rng = np.random.default_rng(7)
    values = _flat_band_pair(rng, 4000, 30.0, -0.05, 100.0)  # b leads a by 50 ms
    assert _lag_of(values, 0.5).lag_s == pytest.approx(-0.05, abs=0.2 / FS)


def test_phat_is_sharper_than_plain_on_a_narrow_band_source():
    # narrow-band source: lightly damped 5 Hz oscillator response; sensors see it 8 samples apart
    # with 10 % independent broadband noise
    rng = np.random.default_rng(8)
    n, shift = 12000, 8
    source = simulate_sdof(5.0, 0.02, FS, n + shift, rng)
    source /= source.std()
    a = source[shift:] + 0.1 * rng.standard_normal(n)
    b = source[:n] + 0.1 * rng.standard_normal(n)
    values = np.column_stack([a, b])  # b(t) = a(t - shift): b lags a by `shift` samples
    plain = _lag_of(values, 2.0)
    phat = _lag_of(values, 2.0, weighting="phat")
    # plain envelope width ~ 2 ln2 / (zeta wn) = 2.2 s; PHAT ~ a few samples
    assert phat.peak_width_s < 0.1 * plain.peak_width_s
    assert plain.peak_width_s == pytest.approx(2 * np.log(2) / (0.02 * 2 * np.pi * 5.0), rel=0.3)
    # the price of whitening: bands where the noise dominates enter with full weight, so the
    # PHAT lag is noisier (Knapp & Carter 1976), and its reported stderr says so
    assert plain.lag_s == pytest.approx(shift / FS, abs=3 * plain.lag_stderr_s)
    assert phat.lag_s == pytest.approx(shift / FS, abs=3 * phat.lag_stderr_s)
    assert phat.lag_stderr_s > 5 * plain.lag_stderr_s


def test_weak_peak_and_peak_beyond_max_lag():
    rng = np.random.default_rng(9)
    noise = rng.standard_normal((4000, 2))
    assert "weak_peak" in _lag_of(noise, 0.5).quality
    # broad correlation exp(-|tau - 0.8|/0.5) searched on +/- 0.5 s: the largest value is at the edge
    lags = np.arange(-50, 51) / FS
    rho = 0.9 * np.exp(-np.abs(lags - 0.8) / 0.5)
    cut = estimate_lag(rho, np.full(101, 0.01), -0.5, 1 / FS, 40.0)
    assert "peak_at_max_lag" in cut.quality and np.isnan(cut.lag_s)
    inside = estimate_lag(rho, np.full(101, 0.01), -0.5, 1 / FS, 40.0, max_lag_s=0.3)
    assert "peak_at_max_lag" in inside.quality


def _lag_variance_full_spectrum(rho, peak_index, dt, record_s, auto_a, auto_b, weighting, peak_coef):
    """Knapp & Carter (1976) Eq. (16) summed over every bin of numpy's complex FFT (reference)."""
    from scipy.signal.windows import parzen
    L = (len(rho) - 1) // 2
    half = min(L - abs(peak_index - L), len(auto_a) - 1, len(auto_b) - 1)
    window = parzen(2 * half + 1)
    n_fft = __import__("scipy.fft").fft.next_fast_len(8 * half, real=False)

    def centred(values, centre):
        seg = np.zeros(n_fft)
        part = values[centre - half:centre + half + 1] * window
        seg[:half + 1], seg[n_fft - half:] = part[half:], part[:half]
        return seg

    mag_ab = np.abs(dt * np.fft.fft(centred(rho, peak_index)))
    autos = [np.real(dt * np.fft.fft(centred(np.concatenate([a[half:0:-1], a[:half + 1]]), half)))
             for a in (auto_a, auto_b)]
    product = np.clip(autos[0], 0, None) * np.clip(autos[1], 0, None)
    w2 = (2 * np.pi * np.fft.fftfreq(n_fft, dt)) ** 2
    tiny = 1e-9 * mag_ab.max()
    psi = {"none": np.ones(n_fft), "phat": 1 / np.maximum(mag_ab, tiny),
           "scot": 1 / np.maximum(np.sqrt(product), tiny)}[weighting]
    df = 1 / (n_fft * dt)
    numerator = np.sum(w2 * psi ** 2 * np.clip(product - mag_ab ** 2, 0, None)) * df
    return numerator / (record_s * (np.sum(w2 * psi * mag_ab) * df) ** 2)


@pytest.mark.parametrize("weighting", ["none", "phat", "scot"])
def test_lag_variance_on_real_transforms_equals_the_full_complex_spectrum_sum(weighting):
    # the rfft form counts the bins strictly between 0 and Nyquist twice: the spectra of real
    # sequences are Hermitian, so the sums over all bins of numpy's complex FFT are the same
    from corrtransforms.time_delay import lag_variance
    rng = np.random.default_rng(11)
    n, L, dt = 6000, 300, 0.01
    a = np.convolve(rng.normal(size=n + 50), np.hanning(9), "same")[:n]
    b = np.roll(a, 7) + 0.8 * rng.normal(size=n)

    def coefficient(u, v):
        u, v = (u - u.mean()) / u.std(), (v - v.mean()) / v.std()
        return np.correlate(v, u, "full")[n - 1 - L:n + L] / n

    rho, auto_a, auto_b = coefficient(a, b), coefficient(a, a)[L:], coefficient(b, b)[L:]
    for peak_index in (L + 7, L + 7 + 43, L - 120):  # different peak positions: different widths
        got = lag_variance(rho, peak_index, dt, n * dt, auto_a, auto_b, weighting, 0.5)
        expected = _lag_variance_full_spectrum(rho, peak_index, dt, n * dt, auto_a, auto_b, weighting, 0.5)
        assert np.isfinite(got) and got > 0
        # PHAT/SCOT divide by small spectral values, which amplifies the two FFT algorithms'
        # rounding differences to ~1e-12 relative (common practice tolerance)
        np.testing.assert_allclose(got, expected, rtol=1e-9)
