"""The speed-ups of the performance work change no result, and the benchmark's own variants
compute what they claim.

- batched stationarity screening of a window (all channels' transforms at once, cross-products of
  complete records from one matrix product) equals screening each channel and pair on its own
  with the single-record functions, which tests/stages/test_screen.py checks against references;
- the line finder of screening (a bounded search for the running median) equals the full running
  median of ``scipy.ndimage.median_filter``;
- the time scales with a memory limit equal those without it wherever the memory is below the
  limit, and say "too long" wherever it is not;
- the Huber iterations' median equals numpy's exactly;
- the plain-script baseline and the floor of benchmarks/run_all.py give the correlation that
  ``scipy.signal.correlate`` gives (the floor's lag sums, the script's coefficients) on a small
  invented archive.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pyarrow.parquet as pq
import pytest
import scipy.linalg
import scipy.signal

from corrtransforms.config import ScreeningConfig
from corrtransforms.numerics import record_memory, segments, spectra
from corrtransforms.records import WindowBlock
from corrtransforms.stages import screen as st

FS = 50.0


def _block(rng, n=6000, channels=4, gaps=False) -> WindowBlock:
    # coloured noise with a shared component (so the pairs are correlated) and, in channel 2, a
    # burst half-way (so some subject is flagged)
    x = scipy.signal.lfilter([1.0], [1.0, -0.8], rng.standard_normal((n, channels)), axis=0)
    x += 0.7 * scipy.signal.lfilter([1.0], [1.0, -0.5], rng.standard_normal(n))[:, None]
    x[n // 2 : n // 2 + 400, 2] *= 5.0
    valid = np.ones_like(x, dtype=bool)
    if gaps:
        valid[rng.random(x.shape) < 0.02] = False
        valid[1000:1300, 1] = False
    return WindowBlock(
        asset="a",
        window_start_us=0,
        window_length_s=n / FS,
        sample_rate_hz=FS,
        channels=tuple(f"c{i}" for i in range(channels)),
        values=np.where(valid, x, 0.0),
        valid=valid,
    )


@pytest.mark.parametrize("gaps", [False, True])
def test_batched_screening_equals_screening_each_subject(gaps):
    block = _block(np.random.default_rng(11 + gaps), gaps=gaps)
    config = ScreeningConfig(segments=20, alpha=0.05)
    window = st.screen_window(block, config, "all")
    names = block.channels
    alone = {}
    for i, name in enumerate(names):
        alone[name] = st.screen_channel(block.values[:, i], block.valid[:, i], FS, 20, 0.05, subject=name)
    assert any(r.flagged for r in alone.values())  # the burst is found: the comparison means something
    for name in names:
        got, want = window.subjects[name], alone[name]
        assert (got.segments, got.flagged, got.quality) == (want.segments, want.flagged, want.quality)
        np.testing.assert_allclose(got.p_value, want.p_value, rtol=1e-12)
        np.testing.assert_allclose(got.memory_s, want.memory_s, rtol=1e-12)
        for test, p in want.test_p_values.items():
            np.testing.assert_allclose(got.test_p_values[test], p, rtol=1e-12)
    for i in range(len(names)):
        for j in range(i + 1, len(names)):
            a, b = names[i], names[j]
            memory = max(alone[a].memory_s, alone[b].memory_s)
            count = record_memory.segments_for_record(block.n_samples / FS, memory, 20)
            want = st.screen_pair(
                block.values[:, i],
                block.valid[:, i],
                block.values[:, j],
                block.valid[:, j],
                FS,
                count,
                0.05,
                f"{a}:{b}",
                memory,
            )
            got = window.subjects[f"{a}:{b}"]
            assert got.segments == want.segments
            # the joint test alone equals the pair screened alone; the row's p is the Sidak
            # family p over the joint test and both channels (Sidak 1967; screen.sidak_family_p)
            np.testing.assert_allclose(got.test_p_values["joint_cross_product"], want.p_value, rtol=1e-12)
            family = [q for q in (want.p_value, alone[a].p_value, alone[b].p_value) if np.isfinite(q)]
            np.testing.assert_allclose(got.p_value, 1.0 - (1.0 - min(family)) ** len(family), rtol=1e-12)
            for test, value in want.test_statistics.items():
                np.testing.assert_allclose(got.test_statistics[test], value, rtol=1e-12)


def test_time_scales_of_several_records_equal_one_at_a_time():
    rng = np.random.default_rng(5)
    block = _block(rng, gaps=True)
    records = np.where(block.valid, block.values, 0.0).T
    batch = record_memory.record_time_scales(np.ascontiguousarray(records), np.ascontiguousarray(block.valid.T), FS)
    for i in range(records.shape[0]):
        one = record_memory.correlation_time_scales(block.values[:, i], block.valid[:, i], FS)
        assert dataclasses.astuple(batch[i]) == pytest.approx(dataclasses.astuple(one), rel=1e-12)


def _full_median_lines(power, width, threshold, reach):
    # the reference: scipy's running median over every ordinate, mirrored ends
    import scipy.ndimage

    local = scipy.ndimage.median_filter(power, size=width, mode="mirror")
    found = power > threshold * np.maximum(local, 1e-300)
    if reach and found.any():
        found = scipy.ndimage.binary_dilation(found, structure=np.ones(2 * reach + 1, dtype=bool))
    return found, local[found]


LINE_CASES = ["white", "steep", "tones", "edge_tone", "short", "zeros", "many_lines"]


@pytest.mark.parametrize("kind", LINE_CASES)
def test_line_finder_equals_the_full_running_median(kind):
    rng = np.random.default_rng(100 + LINE_CASES.index(kind))
    m = 20 if kind == "short" else 30001
    power = rng.exponential(size=m)  # a periodogram of white noise: chi-square with 2 dof / 2
    if kind == "steep":
        power *= np.exp(-np.linspace(0, 40, m))  # twelve decades across the band
    if kind in ("tones", "many_lines"):
        where = rng.choice(m, 3 if kind == "tones" else 5000, replace=False)
        power[where] *= rng.uniform(30, 500, len(where))
    if kind == "edge_tone":
        power[[0, 1, m - 1]] = 1e4
    if kind == "zeros":
        power[: m // 2] = 0.0
    for width, reach in ((25, 3), (49, 6), (7, 0)):
        got_lines, got_local = spectra.spectral_lines(power, width, spectra.LINE_THRESHOLD, reach)
        want_lines, want_local = _full_median_lines(power, width, spectra.LINE_THRESHOLD, reach)
        np.testing.assert_array_equal(got_lines, want_lines)
        np.testing.assert_array_equal(got_local, want_local)
    if kind in ("tones", "edge_tone"):
        assert want_lines.any()  # the comparison covers found lines


def test_memory_limit_keeps_time_scales_below_it_and_marks_longer_memory():
    # below the limit: the same scales as the full 2n-point computation (the line finder's
    # resolution differs, so to a tolerance); above: memory_s beyond the limit, so not screened
    rng = np.random.default_rng(21)
    n, fs = 30000, 50.0
    limit = record_memory.screening_memory_limit_s(n / fs)  # 6 s for a 10-minute record
    for phi, long_memory in ((0.9, False), (0.98, False), (0.9995, True)):
        x = scipy.signal.lfilter([1.0], [1.0, -phi], rng.standard_normal(n))
        full = record_memory.correlation_time_scales(x, None, fs)
        capped = record_memory.correlation_time_scales(x, None, fs, limit)
        if long_memory:
            assert full.memory_s > limit and capped.memory_s > limit
            assert record_memory.segments_for_record(n / fs, capped.memory_s, 20) == 0
        else:
            assert full.memory_s < limit
            assert capped.memory_s == pytest.approx(full.memory_s, rel=1e-6)
            assert capped.degrees_of_freedom_per_sample == pytest.approx(full.degrees_of_freedom_per_sample, rel=1e-6)
    # a lightly damped mode (envelope decay 16 s at 2 Hz, damping 0.005) is too long with or
    # without the limit, although its |rho| at the limit itself may be in a trough
    t = np.arange(n) / fs
    wn, zeta = 2 * np.pi * 2.0, 0.005
    system = scipy.signal.lti([wn**2], [1, 2 * zeta * wn, wn**2])
    _, y, _ = scipy.signal.lsim(system, rng.standard_normal(n), t)
    assert record_memory.correlation_time_scales(y, None, fs, limit).memory_s > limit


def test_segment_statistics_of_rows_match_numpy_and_do_not_depend_on_the_batch():
    block = _block(np.random.default_rng(9))
    block.valid[1000:1300, 1] = False  # one gappy channel beside complete ones
    records = np.ascontiguousarray(np.where(block.valid, block.values, 0.0).T)
    valid = np.ascontiguousarray(block.valid.T)
    complete = valid.all(axis=1)
    assert complete.any() and not complete.all()  # both branches of the batched function
    for count in (10, 20, 17):
        length = records.shape[1] // count
        mixed = segments.segment_statistics_of_rows(records, valid, count)
        whole = segments.segment_statistics_of_rows(records[complete], valid[complete], count)
        for row, got in enumerate(mixed):
            x, ok = records[row], valid[row]
            center = x[ok].mean()
            # reference: numpy per segment (Bendat & Piersol Sect. 10.3: mean square per interval)
            for i in range(count):
                seg = slice(i * length, (i + 1) * length)
                dev = x[seg][ok[seg]] - center
                assert got.mean_product[i] == pytest.approx(np.mean(dev**2), rel=1e-12)
                assert got.kurtosis[i] == pytest.approx(np.mean(dev**4) / np.mean(dev**2) ** 2, rel=1e-12)
                assert got.mean[i] == pytest.approx(np.mean(x[seg][ok[seg]]), rel=1e-12, abs=1e-12)
            alone = segments.segment_statistics(block.values[:, row], block.valid[:, row], count)
            for field in ("valid_count", "mean", "mean_product", "kurtosis"):  # a batch of one: the same bits
                np.testing.assert_array_equal(getattr(got, field), getattr(alone, field))
        for got, want in zip(whole, [m for m, c in zip(mixed, complete) if c]):
            for field in ("valid_count", "mean", "mean_product", "kurtosis"):  # complete branch == masked branch
                np.testing.assert_array_equal(getattr(got, field), getattr(want, field))


def test_cross_products_of_a_window_match_numpy():
    rng = np.random.default_rng(8)
    block = _block(rng)
    block.valid[1000:1300, 1] = False  # one gappy channel beside complete ones
    records = np.ascontiguousarray(np.where(block.valid, block.values, 0.0).T)
    valid = np.ascontiguousarray(block.valid.T)
    batched = segments.SegmentCrossProducts(records, valid)
    complete = np.flatnonzero(valid.all(axis=1))
    gappy = np.flatnonzero(~valid.all(axis=1))
    for a, b in ((complete[0], complete[1]), (gappy[0], complete[0])):  # matrix-product and per-pair sums
        for count in (10, 17, 20):
            got = batched.statistics(a, b, count)
            both = valid[a] & valid[b]
            ca, cb = records[a][both].mean(), records[b][both].mean()
            length = records.shape[1] // count
            # reference: numpy mean of (a - a_bar)(b - b_bar) per segment (Bendat & Piersol Sect. 10.3)
            want = [
                np.mean(
                    ((records[a] - ca) * (records[b] - cb))[i * length : (i + 1) * length][
                        both[i * length : (i + 1) * length]
                    ]
                )
                for i in range(count)
            ]
            assert got.segment_length == length
            np.testing.assert_allclose(got.mean_product, want, rtol=1e-10)


# --------------------------------------------------------------------------------------------
# The benchmark's baseline and floor (benchmarks/scale_script.py, benchmarks/scale_floor.py)


@pytest.fixture(scope="module")
def one_hour_archive(tmp_path_factory):
    from benchmarks import scale_archive

    folder = str(tmp_path_factory.mktemp("scale") / "archive")
    scale_archive.write_archive(folder, days=1, hours=1)
    return folder


def _window_records(archive, window):
    from benchmarks import scale_archive

    path = scale_archive.archive_files(archive)[0]
    table = pq.read_table(path, columns=list(scale_archive.CHANNELS))
    n = 60_000
    return np.column_stack([table.column(c).to_numpy().astype(float) for c in scale_archive.CHANNELS])[
        window * n : (window + 1) * n
    ]


def test_floor_lag_sums_equal_scipy_correlate(one_hour_archive):
    from benchmarks import scale_floor

    out = scale_floor.run(one_hour_archive)
    assert out["windows"] == 6 and out["samples"] == 6 * 60_000 * 8
    L = 1000
    expected = 0.0
    for w in range(6):
        x = _window_records(one_hour_archive, w)
        n = len(x)
        keep = np.abs(scipy.signal.correlation_lags(n, n)) <= L
        for a in range(8):
            for b in range(a, 8):
                # reference: scipy.signal.correlate (lag sums sum_t a(t) b(t + k), k = -L..L)
                expected += scipy.signal.correlate(x[:, b], x[:, a], method="fft")[keep].sum()
    assert out["checksum"] == pytest.approx(expected, rel=1e-9)


def test_plain_script_coefficients_and_indicators(one_hour_archive, tmp_path):
    from benchmarks import scale_script

    out = scale_script.run(one_hour_archive, str(tmp_path))
    assert out == {"windows": 6, "skipped": 0}
    correlations = pq.read_table(str(tmp_path / "date=2024-03-04" / "correlations.parquet")).to_pandas()
    indicators = pq.read_table(str(tmp_path / "date=2024-03-04" / "indicators.parquet")).to_pandas()
    assert len(correlations) == 6 * 36
    x = _window_records(one_hour_archive, 0)
    x = x - x.mean(axis=0)
    n = len(x)
    first = correlations.iloc[:36]
    row = first[(first.channel_a == "acc1") & (first.channel_b == "acc8")].iloc[0]
    rho = np.asarray(row.coefficient)
    scale = np.sqrt((x[:, 0] ** 2).mean() * (x[:, 7] ** 2).mean())
    for k in (-3, 0, 5, 1000):
        # closed form of the biased estimate: sum_t a(t) b(t + k) / n, over the overlap
        direct = (np.dot(x[: n - k, 0], x[k:, 7]) if k >= 0 else np.dot(x[-k:, 0], x[: n + k, 7])) / n
        assert rho[k + 1000] == pytest.approx(direct / scale, rel=2e-5, abs=2e-7)  # float32 storage
    # the invented ground-borne delay: acc8 sees the component 5 samples (50 ms) after acc7
    lags = indicators[(indicators.subject == "acc7:acc8") & (indicators.indicator == "lag_s")]["value"]
    np.testing.assert_allclose(lags, 0.05, atol=1e-12)
    rms = indicators[(indicators.subject == "acc1") & (indicators.indicator == "rms")]["value"].iloc[0]
    assert rms == pytest.approx(np.sqrt((x[:, 0] ** 2).mean()), rel=1e-12)


def test_the_huber_iterations_median_equals_numpy_median_exactly():
    from corrtransforms.numerics import covariate_model

    rng = np.random.default_rng(12)
    for n in (1, 2, 3, 4, 5, 36, 37, 1440):
        values = np.abs(rng.standard_t(3, size=n))
        assert covariate_model._median(values) == float(np.median(values))
        assert covariate_model._median(np.round(values, 1)) == float(np.median(np.round(values, 1)))  # ties


def test_screening_a_one_channel_window_leaves_the_block_as_it_was():
    # the transposed rows of a one-channel block are a view of it: screening must not write there
    x = scipy.signal.lfilter([1.0], [1.0, -0.8], np.random.default_rng(14).standard_normal((6000, 1)), axis=0)
    x[100] = np.nan
    block = WindowBlock(
        asset="a",
        window_start_us=0,
        window_length_s=6000 / FS,
        sample_rate_hz=FS,
        channels=("c0",),
        values=x,
        valid=np.ones_like(x, dtype=bool),
    )
    valid_before = block.valid.copy()
    st.screen_window(block, ScreeningConfig(), None)
    np.testing.assert_array_equal(block.valid, valid_before)
    assert np.isnan(block.values[100, 0])


def _noisy_hankel(rows=80, columns=16, n_out=4, seed=0):
    """A block Hankel matrix of a decaying two-mode correlation sequence plus noise."""
    from corrtransforms.numerics.multichannel_modes import block_hankel

    rng = np.random.default_rng(seed)
    k = np.arange(rows + columns + 1)[:, None, None] / 20.0
    shapes = rng.standard_normal((2, n_out))
    decay = [np.exp(-0.25 * k) * np.cos(2 * np.pi * 2.0 * k), np.exp(-0.3 * k) * np.cos(2 * np.pi * 3.1 * k)]
    lam = sum(d * np.outer(s, s)[None] for d, s in zip(decay, shapes))
    lam = lam + 1e-3 * rng.standard_normal(lam.shape)
    return block_hankel(lam, rows, columns // n_out), lam


def test_leading_subspace_from_the_gram_matrix_equals_the_svd():
    from corrtransforms.numerics.multichannel_modes import leading_subspace

    H, _ = _noisy_hankel()
    U, s, _ = scipy.linalg.svd(H, full_matrices=False)  # reference: LAPACK's SVD
    for order in (2, 4, 8):
        got = leading_subspace(H, order)
        assert got is not None
        np.testing.assert_allclose(got[1], s[:order], rtol=1e-10)
        # the same subspace: projector onto the columns (signs of singular vectors are arbitrary)
        np.testing.assert_allclose(got[0] @ got[0].T, U[:, :order] @ U[:, :order].T, atol=1e-7)
    assert leading_subspace(np.outer(np.ones(6), [1.0, 1e-9, 0.0]), 2) is None  # too ill conditioned: SVD


def test_shift_from_two_products_equals_the_least_squares_shift():
    from corrtransforms.numerics.multichannel_modes import _Factorisation

    _, lam = _noisy_hankel()
    f = _Factorisation(lam, 20, "ssi-cov", block_columns=4)
    U, s, _ = scipy.linalg.svd(
        np.vstack([np.hstack([lam[1 + p + q] for q in range(4)]) for p in range(20)]), full_matrices=False
    )
    for order in (2, 4, 8, 12):
        observability = U[:, :order] * np.sqrt(s[:order])
        # A = pinv(O_up) O_down by numpy's lstsq
        expected = np.linalg.lstsq(observability[:-4], observability[4:], rcond=None)[0]
        A, C = f.system(order)
        # eigenvalues are invariant to the sign/similarity of the basis
        np.testing.assert_allclose(
            np.sort_complex(np.linalg.eigvals(A)), np.sort_complex(np.linalg.eigvals(expected)), rtol=1e-9
        )


@pytest.mark.parametrize("n_lags", [40, 1001, 1500])
def test_linear_functional_stderr_equals_the_covariance_matrix_form(n_lags):
    """The O(L log L) form of ``sqrt(w^T Cov w)`` (bartlett._fast_functional_variance) equals the
    quadratic form with the matrix of ``lag_error_covariance`` to rounding, on short, unit-spaced
    and coarsened (above MAX_COVARIANCE_LAGS) lag ranges, and for dense and one-sided weights."""
    from corrtransforms.numerics import bartlett

    rng = np.random.default_rng(n_lags)
    k = np.arange(n_lags)
    # an oscillating, decaying coefficient with estimation noise (lag 0 exactly 1, zero error)
    rho = 0.97**k * np.cos(2 * np.pi * 0.03 * k) + 0.01 * rng.standard_normal(n_lags)
    s = 0.02 + 0.01 * rng.random(n_lags)
    s[0] = 0.0
    # lag 0 exactly 1 (zero Bartlett variance), and 1 to float32 rounding (a tiny one, as stored
    # coefficients have)
    for rho_0 in (1.0, float(np.float32(1.0 - 3e-8))):
        rho[0] = rho_0
        for weights in (rng.standard_normal(n_lags), np.where(k < n_lags // 3, 1.0, 0.0)):
            w, nodes = bartlett.coarsen_lags(weights, k, n_lags)
            matrix = float(np.sqrt(w @ bartlett.lag_error_covariance(rho, s, nodes) @ w))
            assert bartlett.linear_functional_stderr(weights, rho, s, k) == pytest.approx(matrix, rel=1e-12)


def test_bartlett_stderr_at_one_lag_equals_the_transform_form():
    """bartlett_stderr_at (direct dot products at one lag, used at each cross pair's peak) equals
    bartlett_stderr (FFT convolutions at every lag) to rounding, at the ends and inside."""
    from corrtransforms.numerics import bartlett
    from corrtransforms.numerics.correlation import even_extension

    rng = np.random.default_rng(4)
    L = 300
    k = np.arange(L + 1)
    aa = even_extension(0.95**k * np.cos(0.2 * k))
    bb = even_extension(0.9**k)
    lags = np.arange(-L, L + 1)
    ab = 0.6 * 0.93 ** np.abs(lags - 17) * np.cos(0.2 * (lags - 17)) + 0.01 * rng.standard_normal(2 * L + 1)
    every = bartlett.bartlett_stderr(ab, aa, bb, np.ones(2 * L + 1))
    for index in (0, 1, L - 5, L, L + 17, 2 * L - 1, 2 * L):
        assert bartlett.bartlett_stderr_at(ab, aa, bb, index) == pytest.approx(every[index], rel=1e-10)


def test_bartlett_stderr_of_pairs_equals_the_pairwise_form():
    """bartlett_stderr_of_pairs (each channel's transform once per window, an auto pair reusing
    its channel's) equals bartlett_stderr on the pairs' own rows to rounding: relative 1e-10
    where the error is not itself a rounding residue (an auto pair's lag 0, whose variance is 0)."""
    from corrtransforms.numerics import bartlett
    from corrtransforms.numerics.correlation import channel_spectra, correlate_spectra

    rng = np.random.default_rng(6)
    x = scipy.signal.lfilter([1.0], [1.0, -0.9], rng.standard_normal((3000, 3)), axis=0)
    x[:, 2] += np.roll(x[:, 0], 7)
    spectra = channel_spectra(x, FS, 2.0)
    pairs = [(0, 0), (1, 1), (2, 2), (0, 1), (0, 2), (1, 2)]
    est = correlate_spectra(spectra, pairs)
    a_rows, b_rows = np.array([a for a, _ in pairs]), np.array([b for _, b in pairs])
    autos = est.coefficient[:3]
    plain = bartlett.bartlett_stderr(est.coefficient, autos[a_rows], autos[b_rows], est.pair_count)
    shared = bartlett.bartlett_stderr_of_pairs(est.coefficient, autos, a_rows, b_rows, est.pair_count)
    np.testing.assert_allclose(shared, plain, rtol=1e-10, atol=1e-7 * np.nanmax(plain))
