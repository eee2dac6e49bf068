"""The tabular CUSUM and EWMA charts against published tables, worked examples and plain recursions.

Monte Carlo tolerances: 4 standard errors of the mean run length (SE = sample SD of the run lengths
/ sqrt(runs)), plus half a unit in the last digit the table prints. Every simulation is seeded.
"""

from __future__ import annotations

import numpy as np
import pytest
from spanwatch.rules.drift import Ewma, TabularCusum

# D. C. Montgomery, Introduction to Statistical Quality Control, ch. 9, table of ARL performance of the two-sided
# tabular CUSUM with k = 1/2 (also printed as Table 16-9 in Montgomery & Runger, Applied Statistics and Probability
# for Engineers): shift (sigmas) -> ARL for h = 4 and h = 5.
MONTGOMERY_CUSUM_K05 = {
    4.0: {0.0: 168.0, 0.25: 74.2, 0.5: 26.6, 0.75: 13.3, 1.0: 8.38, 1.5: 4.75, 2.0: 3.34, 2.5: 2.62, 3.0: 2.19,
          4.0: 1.71},
    5.0: {0.0: 465.0, 0.25: 139.0, 0.5: 38.0, 0.75: 17.0, 1.0: 10.4, 1.5: 5.75, 2.0: 4.01, 2.5: 3.11, 3.0: 2.57,
          4.0: 2.01},
}

# J. M. Lucas and M. S. Saccucci, "Exponentially weighted moving average control schemes: properties and
# enhancements", Technometrics 32(1) (1990), ARLs of two-sided EWMA schemes with asymptotic limits, as reproduced in
# Montgomery's table of EWMA ARLs (ch. 9). From memory: (lam, L) -> {shift: ARL}.
LUCAS_SACCUCCI = {
    (0.40, 3.054): {0.0: 500.0, 1.0: 14.3},
    (0.25, 2.998): {0.0: 500.0, 1.0: 11.1},
    (0.20, 2.962): {0.0: 500.0, 1.0: 10.5},
    (0.10, 2.814): {0.0: 500.0, 1.0: 10.3},
    (0.05, 2.615): {0.0: 500.0, 1.0: 11.4},
}


def _rounding(value: float) -> float:
    """Half a unit in the last digit of a table entry printed with three significant figures."""
    return 0.5 * 10.0 ** (np.floor(np.log10(value)) - 2)


def run_lengths(chart: TabularCusum | Ewma, shift: float, runs: int, rng: np.random.Generator | int,
                chunk: int) -> np.ndarray:
    """Samples to the first signal (statistic > 1) of ``runs`` independent charts, all from the zero state.

    ``rng`` an int: common random numbers, run i sees the same samples whatever chart is simulated."""
    out = np.empty(runs)
    alive = np.arange(runs)
    t0 = 0
    while alive.size:
        if isinstance(rng, int):
            z = np.random.default_rng([rng, t0]).standard_normal((runs, chunk))[alive]
        else:
            z = rng.standard_normal((alive.size, chunk))
        stat = chart.update(z + shift)
        hit = stat > 1.0
        done = hit.any(axis=1)
        out[alive[done]] = t0 + hit[done].argmax(axis=1) + 1
        alive = alive[~done]
        chart.keep(~done)
        t0 += chunk
    return out


def _check_mc(rl: np.ndarray, published: float, extra: float = 0.0) -> None:
    se = rl.std(ddof=1) / np.sqrt(rl.size)
    tol = 4 * se + _rounding(published) + extra * published
    assert abs(rl.mean() - published) <= tol, f"Monte Carlo ARL {rl.mean():.3f} +- {se:.3f}, published {published}"


# -- CUSUM -------------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("h", "shift", "seed"), [(4.0, 0.0, 1), (4.0, 1.0, 2), (5.0, 0.0, 3), (5.0, 1.0, 4)])
def test_cusum_monte_carlo_arl_matches_montgomery_table(h, shift, seed):
    rng = np.random.default_rng(seed)
    runs = 20_000
    rl = run_lengths(TabularCusum(0.5, h), shift, runs, rng, chunk=64 if shift == 0 else 8)
    _check_mc(rl, MONTGOMERY_CUSUM_K05[h][shift])


def _cusum_loop(z: np.ndarray, k: float, h: float) -> tuple[np.ndarray, ...]:
    """Montgomery's recursion sample by sample, with N+ and N- counted as he defines them."""
    cp = cm = 0.0
    np_ = nm = 0
    out = []
    for v in z:
        cp = max(0.0, v - k + cp)
        cm = max(0.0, -k - v + cm)
        np_ = np_ + 1 if cp > 0 else 0
        nm = nm + 1 if cm > 0 else 0
        out.append((cp, cm, np_, nm))
    return tuple(np.array(c) for c in zip(*out, strict=True))


def test_cusum_vectorised_equals_the_recursion_however_the_samples_are_split():
    rng = np.random.default_rng(7)
    z = rng.standard_normal(3000) + np.r_[np.zeros(1500), np.full(1500, 0.7)]
    cp, cm, np_, nm = _cusum_loop(z, 0.5, 4.0)
    ref = np.maximum(cp, cm) / 4.0
    for cuts in ([3000], [1, 2, 997, 2000], list(np.diff(np.r_[0, np.sort(rng.choice(2999, 40, replace=False)) + 1,
                                                                  3000]))):
        c = TabularCusum(0.5, 4.0)
        stat, runs, i = [], [], 0
        for n in cuts:
            stat.append(c.update(z[i:i + n]))
            runs.append(c.runs)
            i += n
            assert c.upper == pytest.approx(cp[i - 1], abs=1e-9)
            assert c.lower == pytest.approx(cm[i - 1], abs=1e-9)
        np.testing.assert_allclose(np.concatenate(stat), ref, atol=1e-9)
        np.testing.assert_array_equal(np.concatenate(runs), np.where(cp >= cm, np_, nm))


def test_cusum_montgomery_example_worked():
    # Montgomery, Introduction to Statistical Quality Control, ch. 9, Example 9.1 (mu0 = 10, sigma = 1, k = 1/2, h = 5).
    # Data as printed there (Table 9.1; also quoted, citing Montgomery p. 428, by the IMSL C# Numerical Library's EWMA
    # example). Published results, from memory: C+ first exceeds H at period 29 with C+_29 = 5.28 and N+ = 7, so the
    # shift is placed after period 22 and the new mean estimated as 10 + 0.5 + 5.28/7 = 11.25.
    x = np.array([9.45, 7.99, 9.29, 11.66, 12.16, 10.18, 8.04, 11.46, 9.20, 10.34, 9.03, 11.47, 10.51, 9.40, 10.08,
                  9.37, 10.62, 10.31, 8.52, 10.84, 10.90, 9.33, 12.29, 11.50, 10.60, 11.08, 10.38, 11.62, 11.31, 10.52])
    c = TabularCusum(0.5, 5.0)
    stat = c.update(x[:29] - 10.0)
    assert np.flatnonzero(stat > 1.0)[0] + 1 == 29
    assert c.upper == pytest.approx(5.28, abs=0.005)
    assert c.run_length == 7 and c.side == 1
    assert 29 - c.run_length == 22
    assert 10.0 + c.shift_estimate == pytest.approx(11.25, abs=0.005)


def test_cusum_does_not_reset_itself_and_reset_forgets():
    c = TabularCusum(0.5, 4.0)
    stat = c.update(np.full(30, 2.0))
    assert (np.diff(stat) > 0).all() and stat[-1] > 1.0  # stays in alarm while the shift persists
    c.reset()
    assert c.update(np.zeros(3)).tolist() == [0.0, 0.0, 0.0]


def test_cusum_downward_shift_signs():
    c = TabularCusum(0.5, 4.0)
    c.update(np.full(10, -1.5))
    assert c.side == -1 and c.run_length == 10
    assert c.shift_estimate == pytest.approx(-1.5)


# -- EWMA --------------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("lam", "L", "shift", "seed"),
                         [(0.2, 2.962, 0.0, 11), (0.2, 2.962, 1.0, 12), (0.1, 2.814, 0.0, 13), (0.1, 2.814, 1.0, 14)])
def test_ewma_monte_carlo_arl_matches_lucas_saccucci(lam, L, shift, seed):
    # Lucas & Saccucci's ARLs are for the asymptotic limits; the values are from memory: 1 % more tolerance.
    rng = np.random.default_rng(seed)
    rl = run_lengths(Ewma(lam, L, exact_limits=False), shift, 20_000, rng, chunk=64 if shift == 0 else 8)
    _check_mc(rl, LUCAS_SACCUCCI[(lam, L)][shift], extra=0.01)


def test_ewma_exact_limits_only_shorten_the_in_control_arl_a_little():
    # The exact limits are never wider than the asymptotic ones, so on the same samples a run ends no later; they reach
    # their asymptote within a few 1/lam samples, so the ARL0 is not much shorter (robust bounds, no published value).
    exact = run_lengths(Ewma(0.1, 2.814), 0.0, 10_000, 15, chunk=64)
    asymptotic = run_lengths(Ewma(0.1, 2.814, exact_limits=False), 0.0, 10_000, 15, chunk=64)
    assert (exact <= asymptotic).all() and (exact < asymptotic).any()
    assert exact.mean() > 0.9 * asymptotic.mean()


def test_ewma_nist_handbook_worked_example():
    # NIST/SEMATECH e-Handbook of Statistical Methods, section 6.3.2.4 "EWMA Control Charts", example: 20 samples,
    # EWMA_0 = target 50, s = 2.0539, lambda = 0.3, k = 3. Data and the published EWMA statistics (2 decimals) as
    # printed there; limits UCL = 50 + 3 (0.4201)(2.0539) = 52.5884, LCL = 47.4115; the handbook reads the chart as
    # in control (all EWMA values inside the limits) with an upward trend over the last periods.
    data = np.array([52.0, 47.0, 53.0, 49.3, 50.1, 47.0, 51.0, 50.1, 51.2, 50.5, 49.6, 47.6, 49.9, 51.3, 47.8, 51.2,
                     52.6, 52.4, 53.6, 52.1])
    published = np.array([50.60, 49.52, 50.56, 50.18, 50.16, 49.21, 49.75, 49.85, 50.26, 50.33, 50.11, 49.36, 49.52,
                          50.05, 49.38, 49.92, 50.73, 51.23, 51.94, 51.99])
    target, s = 50.0, 2.0539
    e = Ewma(0.3, 3.0, exact_limits=False)
    stat = e.update((data[:7] - target) / s)
    stat = np.r_[stat, e.update((data[7:] - target) / s)]  # in two calls: the state carries over
    np.testing.assert_allclose(target + s * e.values, published[7:], atol=0.005 + 1e-9)
    first = Ewma(0.3, 3.0, exact_limits=False)
    first.update((data[:7] - target) / s)
    np.testing.assert_allclose(target + s * first.values, published[:7], atol=0.005 + 1e-9)
    ucl = target + e.L * e.sigma_w(np.array([1]))[0] * s
    assert ucl == pytest.approx(52.5884, abs=5e-4)
    assert 2 * target - ucl == pytest.approx(47.4115, abs=5e-4)
    assert (stat < 1.0).all()  # in control throughout
    # the exact limits converge to the handbook's asymptotic ones
    exact = Ewma(0.3, 3.0)
    assert exact.sigma_w(np.array([1, 40]))[0] == pytest.approx(0.3)  # sqrt(lam/(2-lam) (1 - 0.49)) = lam at i = 1
    assert exact.sigma_w(np.array([40]))[0] == pytest.approx(0.4201, abs=5e-5)


def test_ewma_vectorised_equals_the_recursion_over_many_calls():
    rng = np.random.default_rng(21)
    z = rng.standard_normal(500) + 0.3
    lam, L = 0.15, 2.8
    w, ref = 0.0, []
    for i, v in enumerate(z, start=1):
        w = lam * v + (1 - lam) * w
        ref.append(abs(w) / (L * np.sqrt(lam / (2 - lam) * (1 - (1 - lam) ** (2 * i)))))
    e = Ewma(lam, L)
    got = np.concatenate([e.update(z[a:b]) for a, b in [(0, 1), (1, 77), (77, 78), (78, 500)]])
    np.testing.assert_allclose(got, ref, rtol=1e-12)
    assert e.shift_estimate == pytest.approx(w)
    e.reset()
    np.testing.assert_allclose(e.update(z), ref, rtol=1e-12)


def test_montgomery_ewma_example_first_values():
    # Montgomery, ch. 9, Example 9.2: the Example 9.1 data on an EWMA with lambda = 0.1, L = 2.7 (mu0 = 10, sigma = 1).
    # From memory: z_1 = 9.945, z_2 = 9.7495, and the limits of period 1 and 2 are 10 +- 0.27 and 10 +- 0.36.
    x = np.array([9.45, 7.99, 9.29])
    e = Ewma(0.1, 2.7)
    e.update(x - 10.0)
    np.testing.assert_allclose(10.0 + e.values[:2], [9.945, 9.7495], atol=5e-5)
    np.testing.assert_allclose(e.L * e.sigma_w(np.array([1, 2])), [0.27, 0.36], atol=0.005)
