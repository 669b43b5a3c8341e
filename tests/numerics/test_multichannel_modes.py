"""Multi-channel modes (SSI-cov / ERA), their tracking, jackknife stderrs and MAC, against outside
references: the exact correlation of a sampled state-space model, simulated chains of masses,
springs and dampers (exact discretisation, tests/support/multichannel_fixtures.py) whose true
modes come from scipy.linalg.eig, scipy.signal.correlate, and the MAC written out with numpy."""

import numpy as np
import pytest
import scipy.signal

from corrtransforms.numerics.correlation import block_lag_sums, channel_spectra, correlate_block
from corrtransforms.numerics.mode_shapes import largest_component, modal_assurance_criterion, normalise_shape
from corrtransforms.numerics.mode_tracking import track_modes
from corrtransforms.numerics.mode_uncertainty import (
    jackknife_stderr,
    leave_one_out_sequences,
    mac_stderr,
    mode_uncertainty,
    window_sequence,
)
from corrtransforms.numerics.multichannel_modes import (
    METHODS,
    IdentifiedModes,
    correlation_sequence,
    identify_modes,
    identify_poles,
)
from tests.support.multichannel_fixtures import (
    chain_system,
    exact_sequence,
    modal_system,
    simulate_records,
    true_modes,
    window_lag_sums,
)

FS = 20.0


def _sequences(record, n_lags, n_segments=32, max_lag_s=None):
    """(window sequence, lag sums, counts) of one record, every channel a reference."""
    n_ch = record.shape[1]
    max_lag_s = max_lag_s or (n_lags + 1) / FS
    pairs, sums, counts = window_lag_sums(record, FS, max_lag_s, n_segments)
    S = correlation_sequence(sums, pairs, range(n_ch), range(n_ch), n_lags)
    N = correlation_sequence(counts, pairs, range(n_ch), range(n_ch), n_lags)
    return window_sequence(S, N), S, N


def _subset(modes: IdentifiedModes, rows) -> IdentifiedModes:
    rows = np.asarray(rows)
    return IdentifiedModes(
        modes.freq_hz[rows],
        modes.damping[rows],
        modes.shapes[rows],
        modes.order[rows],
        modes.n_stable[rows],
        modes.block_rows,
        modes.lag_stride,
        modes.method,
    )


# --- MAC and shape normalisation ------------------------------------------------------------


def test_mac_against_direct_formula():
    # MAC(a, b) = |a^H b|^2 / ((a^H a)(b^H b)) (Allemang & Brown 1982, from memory), written
    # out with numpy.vdot pair by pair
    rng = np.random.default_rng(0)
    a = rng.standard_normal((4, 6)) + 1j * rng.standard_normal((4, 6))
    b = rng.standard_normal((3, 6)) + 1j * rng.standard_normal((3, 6))
    direct = np.array([[abs(np.vdot(x, y)) ** 2 / (np.vdot(x, x).real * np.vdot(y, y).real) for y in b] for x in a])
    np.testing.assert_allclose(modal_assurance_criterion(a, b), direct, rtol=1e-12)
    # closed forms: invariant to a complex factor (1 for collinear), 0 for orthogonal, and
    # [1, 0] against [1, 1]: 1 / (1 * 2) = 0.5
    assert modal_assurance_criterion(a[0], (2 - 3j) * a[0]) == pytest.approx(1.0, abs=1e-14)
    assert modal_assurance_criterion([1.0, 1.0, 0.0], [1.0, -1.0, 0.0]) == pytest.approx(0.0, abs=1e-15)
    assert modal_assurance_criterion([1.0, 0.0], [1.0, 1.0]) == pytest.approx(0.5, rel=1e-15)
    assert np.isnan(modal_assurance_criterion([0.0, 0.0], [1.0, 1.0]))


def test_normalised_shape_has_1_at_the_reference_component_and_keeps_ratios():
    # the definition: phi / phi[r]; ratios phi_j / phi_k are unchanged (arithmetic)
    phi = np.array([0.2 + 0.1j, -1.5 + 0.5j, 0.7 - 0.2j])
    own = normalise_shape(phi)
    assert largest_component(phi) == 1
    assert own[1] == 1 + 0j
    np.testing.assert_allclose(own, phi / phi[1], rtol=1e-15)
    at_ref = normalise_shape(np.stack([phi, 3j * phi]), reference_index=2)
    np.testing.assert_allclose(at_ref[0], at_ref[1], rtol=1e-14)  # the complex factor is gone
    assert at_ref[0, 2] == 1 + 0j


# --- correlation rows -> Lambda_k -------------------------------------------------------------


def test_block_lag_sums_add_up_to_the_window_sums_of_scipy():
    # sum over blocks of sum_t x_a(t) x_b(t + k) = scipy.signal.correlate(x_b, x_a)[lag k]
    # (correlation.py's documented identity); counts n - |k| for a complete record
    rng = np.random.default_rng(1)
    x = rng.standard_normal((700, 3))
    spectra = channel_spectra(x, FS, 1.0, segment_length=90)
    sums, counts = block_lag_sums(spectra, [(0, 1), (2, 2)])
    xd = x - x.mean(axis=0)
    lags = scipy.signal.correlation_lags(700, 700)
    keep = np.abs(lags) <= 20
    for p, (a, b) in enumerate([(0, 1), (2, 2)]):
        np.testing.assert_allclose(sums[p].sum(axis=0), scipy.signal.correlate(xd[:, b], xd[:, a])[keep], atol=1e-9)
        np.testing.assert_array_equal(counts[p].sum(axis=0), 700 - np.abs(np.arange(-20, 21)))


def test_block_pair_counts_of_a_gappy_record_count_valid_pairs():
    # counts by brute force over t in each block
    rng = np.random.default_rng(2)
    x = rng.standard_normal((300, 2))
    x[40:55, 0] = np.nan
    x[200:230, 1] = np.nan
    spectra = channel_spectra(x, FS, 0.5, segment_length=64)
    _, counts = block_lag_sums(spectra, [(0, 1)])
    valid = np.isfinite(x)
    for i in range(counts.shape[1]):
        for j, k in enumerate(range(-10, 11)):
            t = np.arange(i * 64, min(i * 64 + 64, 300))
            t = t[(t + k >= 0) & (t + k < 300)]
            assert counts[0, i, j] == np.sum(valid[t, 0] & valid[t + k, 1])


def test_correlation_sequence_follows_the_lag_convention():
    # Lambda_k[a, r] = E[y_a(t + k) y_r(t)], checked against the plain mean of products; the
    # rows hold R_ab(tau) = E[a(t) b(t + tau)] (correlation.py), pairs (i <= j) only
    rng = np.random.default_rng(3)
    x = rng.standard_normal((5000, 3))
    x[:, 1] += np.roll(x[:, 0], 3)  # channel 1 lags channel 0 by 3 samples
    est = correlate_block(x, FS, 0.5, pairs="all", estimator="unbiased")
    lam = correlation_sequence(est.R, est.pairs, [0, 1, 2], [0, 1], 6)
    xd = x - x.mean(axis=0)
    for k in range(6):
        direct = xd[k:].T @ xd[: len(xd) - k] / (len(xd) - k)
        np.testing.assert_allclose(lam[k], direct[:, :2], atol=1e-12)
    assert lam[3, 1, 0] > 0.9  # the lag shows where b lags a


# --- identification ------------------------------------------------------------------------


@pytest.mark.parametrize("method", METHODS)
def test_exact_correlations_give_the_eigenvalues_of_the_state_matrix(method):
    # exact Lambda_k = C Ad^k P C^T of the sampled chain; the poles of a model of the true order
    # are exp(lambda dt) of the eigenvalues of A (scipy.linalg.eig): frequency, damping and
    # shapes to rounding
    A, B = chain_system([1.0, 1.5, 1.0], [300.0, 250.0, 200.0], [2.0, 0.5, 1.5])
    truth = true_modes(A)
    seq = exact_sequence(A, B, FS, 80, 3)
    poles, _ = identify_poles(seq, FS, orders=[6], block_rows=12, method=method)
    order = np.argsort(poles.freq_hz)
    np.testing.assert_allclose(poles.freq_hz[order], truth.freq_hz, rtol=1e-8)
    np.testing.assert_allclose(poles.damping[order], truth.damping, rtol=1e-6)
    mac = np.diag(modal_assurance_criterion(poles.shapes[order], truth.shapes))
    np.testing.assert_allclose(mac, 1.0, atol=1e-10)
    assert np.all(np.abs(np.angle(normalise_shape(truth.shapes)[:, :])) < np.pi)  # complex modes


def test_six_channel_chain_two_separated_modes():
    # six masses (non-proportional damping: complex modes; 0.77 Hz at 0.6 % and 2.26 Hz at 1.9 %
    # of critical), 9 windows of 1200 s at 20 Hz; truth from eig(A). Tolerances set by the
    # brief: median frequency within 0.1 %, damping within 10 %, MAC of the median shape
    # (normalised at the last mass) >= 0.99
    A, B = chain_system([1.0] * 6, [400.0] * 6, [2.0, 0.6, 0.6, 0.6, 0.6, 1.2])
    truth = true_modes(A)
    records = simulate_records(A, B, FS, int(1200 * FS), np.random.default_rng(11), 9, 6)
    bands = [(0.6, 0.95), (1.9, 2.6)]
    found = {0: [], 1: []}
    for record in records:
        seq, _, _ = _sequences(record, 150)
        for j, band in enumerate(bands):
            modes = identify_modes(seq, FS, band)
            assert modes.n_modes == 1, (band, modes.freq_hz)
            found[j].append((modes.freq_hz[0], modes.damping[0], normalise_shape(modes.shapes[0], 5)))
    for j in (0, 1):
        freq, damping, shapes = (np.array(v) for v in zip(*found[j]))
        assert np.median(freq) == pytest.approx(truth.freq_hz[j], rel=1e-3)
        assert np.median(damping) == pytest.approx(truth.damping[j], rel=0.10)
        median_shape = np.median(shapes.real, axis=0) + 1j * np.median(shapes.imag, axis=0)
        assert modal_assurance_criterion(median_shape, truth.shapes[j]) >= 0.99


def _close_modes_system():
    """Six unit masses, modes at 1.2, 2.0, 2.03 (1.5 % above 2.0), 3.4, 4.6, 5.8 Hz with
    orthonormal (so different) shapes."""
    shapes = np.linalg.qr(np.random.default_rng(4).standard_normal((6, 6)))[0]
    return modal_system([1.2, 2.0, 2.03, 3.4, 4.6, 5.8], [0.01] * 6, shapes)


def test_two_modes_1p5_percent_apart_are_assigned_by_shape():
    # truth from eig(A); the reference frequencies are given swapped, so frequency alone would
    # swap the entries: the MAC term of the cost keeps each entry on its own shape
    A, B = _close_modes_system()
    truth = true_modes(A)
    record = simulate_records(A, B, FS, int(1200 * FS), np.random.default_rng(12), 1, 6)[0]
    seq, _, _ = _sequences(record, 150)
    modes = identify_modes(seq, FS, (1.8, 2.2))
    assert modes.n_modes == 2, modes.freq_hz
    swapped = truth.freq_hz[[2, 1]]
    bands = np.array([[1.8, 2.2], [1.8, 2.2]])  # overlapping bands
    assignment = track_modes(swapped, truth.shapes[[1, 2]], modes.freq_hz, modes.shapes, bands_hz=bands)
    assert assignment.quality == ((), ())
    for entry, mode in enumerate((1, 2)):
        got = assignment.candidate[entry]
        assert modal_assurance_criterion(modes.shapes[got], truth.shapes[mode]) >= 0.95
        assert modes.freq_hz[got] == pytest.approx(truth.freq_hz[mode], rel=2e-3)
    # the candidates' order does not matter
    flipped = track_modes(swapped, truth.shapes[[1, 2]], modes.freq_hz[::-1], modes.shapes[::-1], bands_hz=bands)
    np.testing.assert_array_equal(flipped.candidate, 1 - assignment.candidate)


def test_tracking_codes_for_missing_low_mac_and_shared_poles():
    # constructed cases of the three codes (definitions in mode_tracking.QUALITY_CODES)
    shape = np.array([1.0, 0.5, 0.0])
    other = np.array([0.0, 0.0, 1.0])
    # one candidate at 2.0 Hz with the entries' shape; entry 2 looks at 5 Hz
    result = track_modes([2.0, 2.01, 5.0, 2.0], [shape, shape, shape, other], [2.0], [shape])
    assert result.candidate.tolist() == [0, -1, -1, -1]
    assert result.quality == (("mode_pole_shared",), ("mode_pole_shared",), ("mode_not_found",), ("mode_low_mac",))
    assert result.mac[0] == pytest.approx(1.0) and np.isnan(result.cost[1])
    empty = track_modes([2.0], [shape], [], np.zeros((0, 3)))
    assert empty.candidate.tolist() == [-1] and empty.quality == (("mode_not_found",),)


def test_method_and_band_are_validated():
    seq = np.zeros((20, 2, 2))
    with pytest.raises(ValueError, match="'ssi-cov', 'era'"):
        identify_poles(seq, FS, orders=[2], block_rows=4, method="svd")
    with pytest.raises(ValueError, match="band_hz"):
        identify_modes(seq, FS, (2.0, 1.0))
    with pytest.raises(ValueError, match="NaN"):
        identify_poles(np.full((20, 2, 2), np.nan), FS, orders=[2], block_rows=4)


# --- uncertainty ---------------------------------------------------------------------------


def test_jackknife_of_a_mean_is_the_standard_error_of_the_mean():
    # the delete-one jackknife of the mean reproduces s / sqrt(K) exactly (Efron & Stein 1981,
    # from memory; algebra: theta_(i) - mean = -(x_i - xbar) / (K - 1))
    x = np.random.default_rng(5).standard_normal(20)
    replicates = (x.sum() - x) / (len(x) - 1)
    assert jackknife_stderr(replicates) == pytest.approx(x.std(ddof=1) / np.sqrt(len(x)), rel=1e-12)
    S = np.arange(24.0).reshape(4, 2, 3, 1)
    N = np.full_like(S, 2.0)
    np.testing.assert_allclose(leave_one_out_sequences(S, N)[1], (S.sum(0) - S[1]) / 6.0)


def test_stderr_coverage_by_monte_carlo():
    # 3 channels, modes at 2.0 and 3.0 Hz (a third at 4.5 Hz outside the band), 48 windows of
    # 300 s, fixed seed; windows where a mode is not found are counted, not scored. The coverage
    # of +/-1.96 stderr (frequency and damping, both modes: up to 192 intervals) must lie in
    # [0.88, 0.99]: about +/-3 binomial standard deviations around 0.94 (the t_31 coverage of a
    # correct stderr; mode_uncertainty's docstring). The calibration against [0.93, 0.97] per
    # parameter on 400 windows is benchmarks/bench_multichannel_modes.py --coverage (minutes).
    shapes = np.linalg.qr(np.array([[1.0, 1.0, 1.0], [1.0, 0.2, -1.0], [1.0, -1.2, 0.6]]).T)[0]
    A, B = modal_system([2.0, 3.0, 4.5], [0.02, 0.015, 0.02], shapes)
    truth = true_modes(A)
    records = simulate_records(A, B, FS, int(300 * FS), np.random.default_rng(13), 48, 3)
    inside, z_freq, missed = [], [], 0
    for record in records:
        seq, S, N = _sequences(record, 40)
        modes = identify_modes(seq, FS, (1.7, 3.3))
        assignment = track_modes(truth.freq_hz[:2], truth.shapes[:2], modes.freq_hz, modes.shapes)
        if (assignment.candidate < 0).any():
            missed += 1  # the 3 Hz mode not stable at 300 s with 3 channels: about 5 % of windows
            continue
        chosen = _subset(modes, assignment.candidate)
        u = mode_uncertainty(S, N, FS, chosen)
        assert u.quality == ((), ())
        zf = (chosen.freq_hz - truth.freq_hz[:2]) / u.freq_stderr_hz
        zd = (chosen.damping - truth.damping[:2]) / u.damping_stderr
        inside.extend(np.abs(np.concatenate([zf, zd])) < 1.96)
        z_freq.extend(zf)
    assert missed <= 5  # about 5 % measured (benchmark); 5 of 48 is 10 %
    assert 0.88 <= np.mean(inside) <= 0.99, np.mean(inside)
    assert abs(np.mean(z_freq)) < 0.3  # no bias beyond 0.3 stderr (3 / sqrt(96) ~ 0.3)


def test_shape_and_mac_stderrs_follow_the_replicates():
    # the shape's and the MAC's stderr are the jackknife of the normalised replicates
    # (mode_uncertainty's definition), and the reference component has none
    shapes = np.linalg.qr(np.array([[1.0, 1.0, 1.0], [1.0, 0.2, -1.0], [1.0, -1.2, 0.6]]).T)[0]
    A, B = modal_system([2.0, 3.0, 4.5], [0.02, 0.015, 0.02], shapes)
    truth = true_modes(A)
    record = simulate_records(A, B, FS, int(300 * FS), np.random.default_rng(14), 1, 3)[0]
    seq, S, N = _sequences(record, 40)
    modes = identify_modes(seq, FS, (1.7, 2.3))
    ref = largest_component(truth.shapes[0])
    u = mode_uncertainty(S, N, FS, modes, reference_index=[ref])
    assert u.shape_stderr_real[0, ref] == 0 and u.shape_stderr_imag[0, ref] == 0
    np.testing.assert_allclose(u.shape_stderr_real[0], jackknife_stderr(u.replicate_shapes[:, 0].real))
    assert np.all(u.shape_stderr_real[0, np.arange(3) != ref] > 0)
    s_mac = mac_stderr(u.replicate_shapes[:, 0], truth.shapes[0])
    assert 0 < s_mac < 0.05
    assert 1 - modal_assurance_criterion(u.shapes[0], truth.shapes[0]) < 4 * s_mac + 1e-3
