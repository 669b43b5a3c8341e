"""Stationarity screening: exact distributions against closed forms, enumeration, scipy,
statsmodels and the published tables; flag rates and power by Monte-Carlo on synthetic records."""

import itertools
import math

import numpy as np
import pytest
from scipy import signal, stats

from corrtransforms.config import ScreeningConfig
from corrtransforms.numerics import rank_tests, record_memory, segments
from corrtransforms.numerics.robust import summarize_baseline
from corrtransforms.records import WindowBlock
from corrtransforms.rejects import WHOLE_WINDOW
from corrtransforms.stages import screen as st

FS = 20.0  # small sample rate so Monte-Carlo runs in seconds
N = int(600 * FS)  # default 10-minute window
ALPHA = 0.05


# ---------------------------------------------------------------------------------------------
# record generators (invented data)


def ar1(rng, phi=0.9, n=N):
    """x_t = phi x_{t-1} + e_t; rho_k = phi^k (Box & Jenkins, Time Series Analysis, Sect. 3.2)."""
    e = rng.standard_normal(n + 500)
    return signal.lfilter([1.0], [1.0, -phi], e)[500:]


def oscillator(rng, freq_hz=2.0, damping=0.05, n=N):
    """White noise through a resonator with poles exp(-zeta w dt +- i w_d dt): a lightly damped
    mode whose correlation envelope decays as exp(-zeta w tau)."""
    w = 2 * math.pi * freq_hz
    dt = 1 / FS
    r = math.exp(-damping * w * dt)
    wd = w * math.sqrt(1 - damping**2)
    e = rng.standard_normal(n + 4000)
    return signal.lfilter([1.0], [1.0, -2 * r * math.cos(wd * dt), r * r], e)[4000:]


def with_burst(rng, x, make, rms_ratio=2.0, burst_s=30.0):
    """Add a 30-s burst at a random place: the record's rms is rms_ratio times larger inside."""
    length = int(burst_s * FS)
    start = rng.integers(0, len(x) - length)
    extra = make(rng, n=length)
    y = x.copy()
    y[start : start + length] += math.sqrt(rms_ratio**2 - 1) * np.std(x) / np.std(extra) * extra
    return y


def variance_tripled_halfway(x):
    y = x.copy()
    y[len(y) // 2 :] *= math.sqrt(3.0)
    return y


def flag_rate(records, segments=20, alpha=ALPHA):
    flags = [st.screen_channel(x, np.ones(len(x), bool), FS, segments, alpha).flagged for x in records]
    return float(np.mean(flags))


def simulation_sd(p, k):
    return math.sqrt(p * (1 - p) / k)


# ---------------------------------------------------------------------------------------------
# reverse arrangements


def test_reverse_arrangements_distribution_matches_enumeration_of_permutations():
    # reference: brute-force enumeration of all N! permutations (closed form by counting)
    for n in range(1, 8):
        counts = np.zeros(n * (n - 1) // 2 + 1)
        for perm in itertools.permutations(range(n)):
            counts[int(rank_tests.reverse_arrangements(perm))] += 1
        assert np.allclose(rank_tests.reverse_arrangements_distribution(n), counts / math.factorial(n), atol=1e-15)
    # Mahonian numbers, row N = 4: 1, 3, 5, 6, 5, 3, 1 (OEIS A008302; Kendall, Rank Correlation
    # Methods, Ch. 4)
    assert np.allclose(rank_tests.reverse_arrangements_distribution(4) * 24, [1, 3, 5, 6, 5, 3, 1])


@pytest.mark.parametrize("n", [2, 5, 10, 20, 47, 100, 200])
def test_reverse_arrangements_moments(n):
    # mean N(N-1)/4 and variance N(2N+5)(N-1)/72 (Bendat & Piersol, Random Data, 4th ed.,
    # Sect. 4.5.2; Kendall, Rank Correlation Methods, Ch. 4)
    pmf = rank_tests.reverse_arrangements_distribution(n)
    a = np.arange(len(pmf))
    mean = float((a * pmf).sum())
    variance = float(((a - mean) ** 2 * pmf).sum())
    assert pmf.sum() == pytest.approx(1.0, abs=1e-12)
    assert mean == pytest.approx(n * (n - 1) / 4, rel=1e-10)
    assert variance == pytest.approx(n * (2 * n + 5) * (n - 1) / 72, rel=1e-9)
    assert np.allclose(pmf, pmf[::-1], atol=1e-15)  # symmetric about the mean


# Bendat & Piersol, Random Data, Appendix A, percentage points A_{N;alpha} of the reverse
# arrangement distribution, P[A > A_{N;alpha}] = alpha. All values FROM MEMORY (not looked up).
REVERSE_ARRANGEMENT_TABLE = {
    #    0.99  0.975  0.95  0.05  0.025  0.01
    10: (9, 11, 13, 31, 33, 35),
    12: (16, 18, 21, 44, 47, 49),
    14: (24, 27, 30, 60, 63, 66),
    16: (34, 38, 41, 78, 81, 85),
    18: (45, 50, 54, 98, 102, 107),
    20: (59, 64, 69, 120, 125, 130),
    30: (152, 162, 171, 263, 272, 282),
    40: (290, 305, 319, 460, 474, 489),
    50: (473, 495, 514, 710, 729, 751),
    60: (702, 731, 756, 1013, 1038, 1067),
    70: (977, 1014, 1045, 1369, 1400, 1437),
    80: (1299, 1344, 1382, 1777, 1815, 1860),
    90: (1668, 1721, 1766, 2238, 2283, 2336),
    100: (2083, 2145, 2198, 2751, 2804, 2866),
}
TABLE_ALPHAS = (0.99, 0.975, 0.95, 0.05, 0.025, 0.01)


def test_reverse_arrangements_percentage_points_match_published_table():
    # tolerance per entry: one count (the table rounds its entries, and its large-N entries
    # follow the normal approximation), two at N = 100
    for n, row in REVERSE_ARRANGEMENT_TABLE.items():
        for alpha, tabulated in zip(TABLE_ALPHAS, row):
            computed = rank_tests.reverse_arrangements_percentage_point(n, alpha)
            assert abs(computed - tabulated) <= (2 if n >= 100 else 1), (n, alpha, computed, tabulated)
    # the table is symmetric: A_{N;1-a} = N(N-1)/2 - A_{N;a} - 1 for every row (a check of the
    # values recalled from memory, and of the exact distribution's symmetry)
    for n, row in REVERSE_ARRANGEMENT_TABLE.items():
        top = n * (n - 1) // 2
        for low, high in zip(row[:3], row[::-1][:3]):
            assert low == top - high - 1


@pytest.mark.parametrize("n", [10, 20, 35])
def test_reverse_arrangements_p_value_equals_scipy_exact_kendall_tau(n):
    # reference: scipy.stats.kendalltau(method="exact") between time index and values; the
    # number of reverse arrangements is the number of discordant pairs (Kendall, Ch. 1)
    rng = np.random.default_rng(n)
    for trial in range(20):
        x = rng.standard_normal(n) + (trial % 4) * 0.08 * np.arange(n)
        result = rank_tests.reverse_arrangements_test(x)
        reference = stats.kendalltau(np.arange(n), x, method="exact")
        assert 1 - 4 * result.statistic / (n * (n - 1)) == pytest.approx(reference.statistic, abs=1e-12)
        assert result.p_value == pytest.approx(reference.pvalue, rel=1e-9, abs=1e-14)


def test_reverse_arrangements_count_and_ties():
    assert rank_tests.reverse_arrangements([1, 2, 3, 4]) == 0
    assert rank_tests.reverse_arrangements([4, 3, 2, 1]) == 6
    assert rank_tests.reverse_arrangements([2, 1, 1]) == 2.5  # a tie counts one half (Kendall)
    with pytest.raises(ValueError):
        rank_tests.reverse_arrangements_test([1.0])


# ---------------------------------------------------------------------------------------------
# runs test


def _enumerated_runs_distribution(n1, n2):
    counts = np.zeros(n1 + n2 + 1)
    for above in itertools.combinations(range(n1 + n2), n1):
        seq = np.zeros(n1 + n2)
        seq[list(above)] = 1
        counts[1 + int(np.count_nonzero(np.diff(seq)))] += 1
    return counts / counts.sum()


@pytest.mark.parametrize("n1,n2", [(1, 1), (2, 5), (5, 5), (6, 4), (7, 7)])
def test_runs_distribution_matches_enumeration(n1, n2):
    # reference: brute-force enumeration of all C(n1+n2, n1) arrangements
    assert np.allclose(rank_tests.runs_distribution(n1, n2), _enumerated_runs_distribution(n1, n2), atol=1e-14)


@pytest.mark.parametrize("n1,n2", [(10, 10), (7, 13), (50, 50)])
def test_runs_moments(n1, n2):
    # mean 2 n1 n2 / n + 1, variance 2 n1 n2 (2 n1 n2 - n) / (n^2 (n - 1)) (Mood 1940, Eq. (5)-(6)
    # from memory; Bendat & Piersol Sect. 4.5.2)
    pmf = rank_tests.runs_distribution(n1, n2)
    r = np.arange(len(pmf))
    n = n1 + n2
    mean = (r * pmf).sum()
    assert mean == pytest.approx(2 * n1 * n2 / n + 1, rel=1e-12)
    assert ((r - mean) ** 2 * pmf).sum() == pytest.approx(
        2 * n1 * n2 * (2 * n1 * n2 - n) / (n * n * (n - 1)), rel=1e-10
    )


def test_runs_normal_approximation_matches_statsmodels():
    # reference: statsmodels.sandbox.stats.runs.runstest_1samp (independent implementation)
    from statsmodels.sandbox.stats.runs import runstest_1samp

    rng = np.random.default_rng(3)
    for n in (20, 40, 60, 100):
        for _ in range(10):
            x = rng.standard_normal(n)
            ours = rank_tests.runs_test(x, method="normal", continuity_correction=False)
            _, p_reference = runstest_1samp(x, cutoff="median", correction=False)
            assert ours.p_value == pytest.approx(p_reference, rel=1e-9)


def test_runs_exact_p_value_matches_enumeration():
    # reference: exact two-sided p from the enumerated distribution (independent of the formula)
    rng = np.random.default_rng(4)
    pmf = _enumerated_runs_distribution(6, 6)
    cdf = np.cumsum(pmf)
    for _ in range(30):
        x = rng.standard_normal(12)
        runs, n_above, n_below = rank_tests.runs_about_median(x)
        assert (n_above, n_below) == (6, 6)
        expected = min(1.0, 2 * min(cdf[runs], 1 - cdf[runs - 1]))
        assert rank_tests.runs_test(x).p_value == pytest.approx(expected, rel=1e-12)


# Bendat & Piersol, Random Data, Appendix A, percentage points r_{n;alpha} of the run
# distribution for n values on each side of the median. Values FROM MEMORY.
RUNS_TABLE = {
    5: (2, 2, 3, 8, 9, 9),
    10: (5, 6, 6, 15, 15, 16),
    20: (13, 14, 15, 26, 27, 28),
    30: (21, 22, 24, 37, 39, 40),
    50: (38, 40, 42, 59, 61, 63),
}


def test_runs_percentage_points_match_published_table():
    for n, row in RUNS_TABLE.items():
        for alpha, tabulated in zip(TABLE_ALPHAS, row):
            computed = rank_tests.runs_percentage_point(n, alpha)
            assert abs(computed - tabulated) <= 1, (n, alpha, computed, tabulated)


# ---------------------------------------------------------------------------------------------
# variance outlier test


def test_variance_outlier_test_size_and_power_on_chi_square_segments():
    # reference: segment variances of independent Gaussian samples are sigma^2 chi2(nu)/nu with
    # nu = n - 1 (Bendat & Piersol Sect. 4.3); the Bonferroni bound makes the rate <= alpha and
    # close to it at small alpha (Cochran 1941)
    rng = np.random.default_rng(8)
    segments, samples, trials = 20, 50, 1500
    rejected = 0
    for _ in range(trials):
        variances = rng.standard_normal((segments, samples)).var(axis=1, ddof=1)
        rejected += rank_tests.variance_outlier_test(variances, samples - 1).p_value <= ALPHA
    rate = rejected / trials
    assert ALPHA - 3 * simulation_sd(ALPHA, trials) <= rate <= ALPHA + 3 * simulation_sd(ALPHA, trials)
    # one segment with twice the variance is found, at the right index
    x = rng.standard_normal((segments, samples))
    x[7] *= math.sqrt(4.0)
    result = rank_tests.variance_outlier_test(x.var(axis=1, ddof=1), samples - 1)
    assert result.index == 7 and result.p_value < 1e-3


# ---------------------------------------------------------------------------------------------
# segment statistics and time scales


def test_segment_statistics_against_numpy_with_mask():
    rng = np.random.default_rng(2)
    x = rng.standard_normal(1003) + 5.0
    valid = rng.random(1003) > 0.1
    s = segments.segment_statistics(x, valid, segments=10)
    center = x[valid].mean()
    assert s.segment_length == 100 and s.center == (center,)
    for i in range(10):
        seg, ok = x[i * 100 : (i + 1) * 100], valid[i * 100 : (i + 1) * 100]
        assert s.valid_count[i] == ok.sum()
        assert s.mean[i] == pytest.approx(np.mean(seg[ok]), rel=1e-12)
        assert s.mean_product[i] == pytest.approx(np.mean((seg[ok] - center) ** 2), rel=1e-12)
    y = 0.5 * x + rng.standard_normal(1003)
    valid_y = rng.random(1003) > 0.2
    c = segments.segment_cross_products(x, y, valid, valid_y, segments=10)
    both = valid & valid_y
    ca, cb = x[both].mean(), y[both].mean()
    for i in range(10):
        sl = slice(i * 100, (i + 1) * 100)
        ok = both[sl]
        assert c.mean_product[i] == pytest.approx(np.mean((x[sl][ok] - ca) * (y[sl][ok] - cb)), rel=1e-12)


def test_time_scales_of_ar1_match_closed_form():
    # rho_k = phi^k: envelope 1/e time theta = -1/(fs ln phi); integral time scale
    # sum_{k>=0} phi^k - 1/2 = 1/(1 - phi) - 1/2 samples (trapezoid rule) (Box & Jenkins Sect. 3.2)
    rng = np.random.default_rng(10)
    phi = 0.9
    theta = -1 / (FS * math.log(phi))
    integral = (1 / (1 - phi) - 0.5) / FS
    decays, integrals, dofs = [], [], []
    for _ in range(10):
        scales = record_memory.correlation_time_scales(ar1(rng, phi), None, FS)
        decays.append(scales.last_lag_above_inv_e_s)
        integrals.append(scales.integral_time_s)
        dofs.append(scales.degrees_of_freedom_per_sample)
        assert scales.line_count == 0  # a smooth spectrum has no sharp lines
    assert np.median(decays) == pytest.approx(theta, rel=0.1)
    assert np.median(integrals) == pytest.approx(integral, rel=0.2)
    # Gaussian mean-square degrees of freedom per sample 1 / sum_k rho_k^2 = (1 - phi^2) / (1 + phi^2)
    # (sum of phi^(2|k|); Bendat & Piersol Sect. 8.2 for the variance of a mean square)
    assert np.median(dofs) == pytest.approx((1 - phi**2) / (1 + phi**2), rel=0.1)


def test_screening_integral_time_stops_at_the_interpolated_zero_crossing():
    # rho_k = 1 - k/m with m = 10.5 crosses zero between lags 10 and 11: the integral to the
    # crossing is the triangle m/2 (closed form). The earlier screening copy integrated through
    # lag 11 (trapezoid including the negative ordinate): 11 - 11^2/(2m) = 5.238 instead of 5.25.
    m = 10.5
    rho = 1.0 - np.arange(40) / m
    scales = record_memory._time_scales_from_correlation(rho, rho, 20, 39, FS, 0, 3.0)
    assert scales.integral_time_s == pytest.approx(m / 2 / FS, rel=1e-12)


def test_time_scales_of_oscillator_and_tone():
    # envelope exp(-zeta w_n tau): decay time 1/(zeta w_n), read at the peaks of |rho|, so at most
    # half a period early (Bendat & Piersol Sect. 5.2, single-degree-of-freedom system)
    rng = np.random.default_rng(12)
    damping, freq = 0.05, 2.0
    theta = 1 / (damping * 2 * math.pi * freq)
    decays = [
        record_memory.correlation_time_scales(oscillator(rng, freq, damping), None, FS).last_lag_above_inv_e_s
        for _ in range(10)
    ]
    assert theta - 0.5 / freq - 0.2 <= np.median(decays) <= theta + 0.2
    # a strong tone never decorrelates; its sharp line is left out of the memory time
    t = np.arange(N) / FS
    noise = ar1(rng)
    tone = noise + 5 * np.std(noise) * np.sin(2 * math.pi * 3.3 * t)
    with_tone = record_memory.correlation_time_scales(tone, None, FS)
    without = record_memory.correlation_time_scales(noise, None, FS)
    assert with_tone.line_count > 0 and without.line_count == 0
    assert with_tone.memory_s == pytest.approx(without.memory_s, rel=0.3)


def test_segment_count_follows_the_independence_rule():
    assert record_memory.segments_for_record(600, 1.0, 20) == 20
    assert record_memory.segments_for_record(600, 4.0, 20) == 15  # 600 / (10 * 4)
    assert record_memory.segments_for_record(600, 7.0, 20) == 0  # 8 < MINIMUM_SEGMENTS
    # oscillator with damping 0.02 at 2 Hz: theta = 3.98 s, so about 15 segments of 40 s
    rng = np.random.default_rng(13)
    counts = [st.screen_channel(oscillator(rng, 2.0, 0.02), np.ones(N, bool), FS).segments for _ in range(15)]
    assert 12 <= np.median(counts) <= 17
    # damping 0.005: theta = 15.9 s, a 10-minute window cannot hold 10 segments of 159 s
    result = st.screen_channel(oscillator(rng, 2.0, 0.005), np.ones(N, bool), FS)
    assert result.quality == (st.QUALITY_TOO_SHORT,) and not result.flagged and math.isnan(result.p_value)


# ---------------------------------------------------------------------------------------------
# flag rate and power (Monte-Carlo, fixed seeds)


@pytest.mark.parametrize("make", [ar1, oscillator], ids=["ar1", "oscillator"])
def test_flag_rate_on_stationary_records_is_alpha(make):
    rng = np.random.default_rng(20)
    trials = 400
    rate = flag_rate([make(rng) for _ in range(trials)])
    # within simulation error of alpha (3 binomial standard deviations); Bonferroni and the
    # discrete runs distribution make it a little conservative (about 0.035-0.04 measured)
    assert abs(rate - ALPHA) <= 3 * simulation_sd(ALPHA, trials), rate


@pytest.mark.parametrize("make", [ar1, oscillator], ids=["ar1", "oscillator"])
def test_variance_tripling_halfway_is_flagged(make):
    rng = np.random.default_rng(21)
    assert flag_rate([variance_tripled_halfway(make(rng)) for _ in range(60)]) > 0.9


@pytest.mark.parametrize("make", [ar1, oscillator], ids=["ar1", "oscillator"])
def test_thirty_second_burst_in_ten_minutes_is_flagged(make):
    # the burst doubles the record's rms for 30 s at a random place
    rng = np.random.default_rng(22)
    assert flag_rate([with_burst(rng, make(rng), make) for _ in range(120)]) > 0.9


@pytest.mark.parametrize("make", [ar1, oscillator], ids=["ar1", "oscillator"])
def test_stationary_record_with_strong_tone_is_not_flagged(make):
    rng = np.random.default_rng(23)
    t = np.arange(N) / FS
    trials = 200
    records = []
    for _ in range(trials):
        x = make(rng)
        # tone with 10 times the random part's power, off the segment grid (3.3 Hz)
        records.append(x + math.sqrt(20) * np.std(x) * np.sin(2 * math.pi * 3.3 * t + rng.uniform(0, 2 * math.pi)))
    assert flag_rate(records) <= ALPHA + 3 * simulation_sd(ALPHA, trials)


# ---------------------------------------------------------------------------------------------
# screen_window


def _block(columns, valid=None, start_us=1_700_000_400_000_000, names=("a", "b")):
    values = np.column_stack(columns)
    mask = np.ones(values.shape, bool) if valid is None else valid
    return WindowBlock(
        asset="test-asset",
        window_start_us=start_us,
        window_length_s=len(values) / FS,
        sample_rate_hz=FS,
        channels=tuple(names),
        values=np.where(mask, values, 0.0),
        valid=mask,
    )


def test_screen_window_rows_propagation_and_exclusion():
    rng = np.random.default_rng(30)
    a = with_burst(rng, ar1(rng), ar1, rms_ratio=3.0)
    b = ar1(rng)
    block = _block([a, b])
    pairs = [("a", "a"), ("b", "b"), ("a", "b")]
    flagged = st.screen_window(block, ScreeningConfig(action="flag"), pairs)
    assert set(flagged.subjects) == {"a", "b", "a:b"}
    rows = {r.subject: r for r in flagged.indicators}
    assert all(
        r.indicator == "stationarity_p" and r.unit == "" and r.window_start_us == block.window_start_us
        for r in rows.values()
    )
    assert rows["a"].value <= ALPHA and rows["a"].quality == "nonstationary"
    assert rows["b"].quality == "ok" and rows["b"].value > ALPHA
    # the pair is flagged because channel a is, although its own joint p may be large
    assert rows["a:b"].quality == "nonstationary" and rows["a:b"].value == flagged.subjects["a:b"].p_value
    assert flagged.subject_quality["a:b"] == ("nonstationary",)
    assert not flagged.excluded and flagged.rejects == ()

    excluded = st.screen_window(block, ScreeningConfig(action="exclude"), pairs)
    assert excluded.excluded
    (reject,) = excluded.rejects
    assert (reject.stage, reject.subject, reject.reason, reject.action) == (
        "screen",
        WHOLE_WINDOW,
        "nonstationary_window",
        "rejected",
    )
    assert reject.window_start_us == block.window_start_us and reject.asset == "test-asset"
    assert "a: p=" in reject.detail and "alpha=0.05" in reject.detail

    off = st.screen_window(block, ScreeningConfig(enabled=False), pairs)
    assert off.indicators == () and not off.excluded


def test_joint_test_flags_a_change_of_coupling():
    # each channel keeps its variance, but their correlation flips sign halfway
    rng = np.random.default_rng(31)
    flags, channel_flags = 0, 0
    for _ in range(20):
        common, a_own, b_own = ar1(rng), ar1(rng), ar1(rng)
        sign = np.where(np.arange(N) < N // 2, 1.0, -1.0)
        result = st.screen_window(_block([common + 0.5 * a_own, sign * common + 0.5 * b_own]), ScreeningConfig(), "all")
        flags += result.subjects["a:b"].p_value <= ALPHA
        channel_flags += result.subjects["a"].flagged + result.subjects["b"].flagged
    assert flags >= 18 and channel_flags <= 4


def test_gaps_and_short_windows_give_quality_codes_not_flags():
    rng = np.random.default_rng(32)
    x = ar1(rng)
    valid = np.ones(N, bool)
    valid[int(100 * FS) : int(160 * FS)] = False  # a 60-s gap removes two 30-s segments
    result = st.screen_channel(x, valid, FS)
    assert result.segments == 18 and result.quality in ((), ("nonstationary",))
    # a 60-s window of a mode with a 1.6-s decay time cannot hold 10 segments of 16 s
    short = oscillator(rng, n=int(60 * FS))
    block = _block([short, short + rng.standard_normal(len(short))])
    screening = st.screen_window(block, ScreeningConfig(action="exclude"), "all")
    assert not screening.excluded
    for subject in ("a", "b", "a:b"):
        assert screening.subject_quality[subject] == (st.QUALITY_TOO_SHORT,)
        row = next(r for r in screening.indicators if r.subject == subject)
        assert math.isnan(row.value) and row.quality == st.QUALITY_TOO_SHORT
    # a dead channel is reported, not flagged
    flat = st.screen_channel(np.full(N, 2.0), np.ones(N, bool), FS)
    assert flat.quality == (st.QUALITY_NOT_SCREENED,) and not flat.flagged
    with pytest.raises(ValueError, match="does not hold"):
        st.screen_window(block, ScreeningConfig(), [("a", "c")])


def test_exclude_keeps_burst_windows_out_of_the_baseline():
    # a baseline of 40 windows of which 6 hold a heavy 30-s burst (rms three times larger)
    rng = np.random.default_rng(33)
    config = ScreeningConfig(action="exclude")
    burst_windows = {3, 9, 15, 22, 30, 36}
    rms, excluded = [], []
    for i in range(40):
        x = ar1(rng)
        if i in burst_windows:
            x = with_burst(rng, x, ar1, rms_ratio=3.0)
        screening = st.screen_window(_block([x], names=("a",), start_us=i * 600_000_000), config, "auto")
        rms.append(float(np.std(x)))
        excluded.append(screening.excluded)
    rms, excluded = np.array(rms), np.array(excluded)
    is_burst = np.isin(np.arange(40), sorted(burst_windows))
    assert excluded[is_burst].all()  # every burst window goes to rejects
    assert excluded[~is_burst].sum() <= 3  # false exclusions at about alpha
    kept = summarize_baseline(rms[~excluded], np.full((~excluded).sum(), 0.01), min_windows=10)
    clean = summarize_baseline(rms[~is_burst], np.full((~is_burst).sum(), 0.01), min_windows=10)
    with_bursts = summarize_baseline(rms, np.full(40, 0.01), min_windows=10)
    # the baseline without the burst windows is the baseline of the clean windows (within a
    # fraction of its standard error)
    standard_error = clean.scale / math.sqrt(clean.n)
    assert abs(kept.location - clean.location) <= 0.5 * standard_error
    assert with_bursts.n == 40 and kept.n == clean.n - int(excluded[~is_burst].sum())
    # and the burst windows are far outside the clean baseline: had they been kept, each would
    # be an outlier of the indicator series
    assert (rms[is_burst] > clean.location + 3 * clean.scale).all()


def test_pair_row_false_flag_rate_is_at_most_alpha():
    # 200 stationary windows of two correlated AR(1) channels. A pair row combines three tests
    # (its joint test and both channels'); Sidak's correction (Sidak 1967, J. Am. Stat. Assoc.
    # 62, 626-633) keeps its false-flag rate at or below alpha. One-sided binomial tolerance:
    # alpha + 2 sd at n = 200 (sd 1.5 %). The union rule it replaced flags every window in which
    # any of the three flags, about 1 - 0.95^3 = 14 % for independent tests.
    rng = np.random.default_rng(33)
    windows, row_flags, union_flags = 200, 0, 0
    for _ in range(windows):
        common, a_own, b_own = ar1(rng, n=N // 2), ar1(rng, n=N // 2), ar1(rng, n=N // 2)
        result = st.screen_window(_block([common + a_own, common + b_own]), ScreeningConfig(), "all")
        pair = result.subjects["a:b"]
        row_flags += pair.flagged
        union_flags += (
            result.subjects["a"].flagged
            or result.subjects["b"].flagged
            or pair.test_p_values["joint_cross_product"] <= ALPHA
        )
    sd = np.sqrt(ALPHA * (1 - ALPHA) / windows)
    assert row_flags / windows <= ALPHA + 2 * sd, row_flags
    assert union_flags > row_flags
