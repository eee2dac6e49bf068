"""ARL computations and chart design against published tables, and the false-alarm budget by simulation."""

from __future__ import annotations

import numpy as np
import pytest
from spanwatch.rules.drift import (
    TabularCusum,
    arl0_for,
    cusum_arl,
    cusum_h,
    design_cusum,
    design_ewma,
    ewma_arl,
    ewma_L,
    ewma_lambda,
)
from test_drift_charts import LUCAS_SACCUCCI, MONTGOMERY_CUSUM_K05, _rounding

CUSUM_CASES = [(h, s, arl) for h, row in MONTGOMERY_CUSUM_K05.items() for s, arl in row.items()]


@pytest.mark.parametrize(("h", "shift", "published"), CUSUM_CASES)
def test_brook_evans_markov_chain_matches_montgomery_table(h, shift, published):
    # Montgomery's two-sided table, k = 1/2 (see test_drift_charts). Tolerance: the table's rounding (half a unit of
    # its last digit) plus 0.2 % for the 300-state chain's discretisation.
    got = cusum_arl(0.5, h, shift, method="markov")
    assert abs(got - published) <= _rounding(published) + 0.002 * published


@pytest.mark.parametrize(("h", "shift", "published"), [c for c in CUSUM_CASES if c[1] <= 1.0])
def test_siegmund_approximation_within_its_known_accuracy(h, shift, published):
    # Siegmund's approximation (as given by Montgomery ch. 9) is within about 1 % for k = 1/2, h = 4..5 and shifts up
    # to 1 sigma: tolerance 1.5 %. For larger shifts it runs short (e.g. 1.44 vs 1.71 at 4 sigma, h = 4) and is not
    # held to the table.
    got = cusum_arl(0.5, h, shift, method="siegmund")
    assert abs(got - published) <= 0.015 * published


def test_siegmund_and_markov_are_different_methods():
    # Two independent computations of the same quantity: close, but not the same number.
    a, b = cusum_arl(0.5, 4.0, method="siegmund"), cusum_arl(0.5, 4.0, method="markov")
    assert a != pytest.approx(b, rel=1e-3) and a == pytest.approx(b, rel=0.02)


def test_markov_chain_converges_with_its_states():
    coarse, fine = cusum_arl(0.5, 5.0, states=100), cusum_arl(0.5, 5.0, states=1200)
    assert abs(coarse - fine) / fine < 1e-3


def test_one_sided_arl_is_twice_the_two_sided_in_control():
    # By symmetry in control 1/ARL = 2/ARL+.
    assert cusum_arl(0.5, 4.0, two_sided=False) == pytest.approx(2 * cusum_arl(0.5, 4.0))


@pytest.mark.parametrize(("arl0", "h"), [(168.0, 4.0), (465.0, 5.0)])
def test_cusum_h_round_trips_the_table(arl0, h):
    # The table's ARL0 are rounded to integers (+-0.5, i.e. about +-0.3 % and +-0.1 %); near h = 4..5 the ARL0 grows
    # by about a factor e^1 per unit of h, so the h they imply is good to a few thousandths.
    assert cusum_h(0.5, arl0) == pytest.approx(h, abs=0.01)
    assert cusum_h(0.5, arl0, method="siegmund") == pytest.approx(h, abs=0.03)


def test_cusum_h_solves_for_large_arl0():
    h = cusum_h(0.5, 1e6)
    assert cusum_arl(0.5, h) == pytest.approx(1e6, rel=1e-6)
    assert 10.0 < h < 15.0  # Siegmund: 2 exp(h + 1.166) ~ 2e6 one-sided, i.e. h ~ 12.7


@pytest.mark.parametrize(("lam", "L", "shift"), [(lam, L, s) for (lam, L), row in LUCAS_SACCUCCI.items() for s in row])
def test_ewma_markov_arl_matches_lucas_saccucci(lam, L, shift):
    # Lucas & Saccucci (1990) table values, from memory (see test_drift_charts): tolerance 1 % (the chain's
    # discretisation is below 0.2 %; the rest is for the recalled values).
    published = LUCAS_SACCUCCI[(lam, L)][shift]
    assert ewma_arl(lam, L, shift) == pytest.approx(published, rel=0.01)


@pytest.mark.parametrize(("lam", "L"), [(0.1, 2.814), (0.2, 2.962), (0.05, 2.615)])
def test_ewma_L_round_trips_lucas_saccucci(lam, L):
    # The table's L are printed to three decimals for ARL0 = 500.
    assert ewma_L(lam, 500.0) == pytest.approx(L, abs=0.003)


def test_design_cusum_and_ewma():
    k, h = design_cusum(1.0, 465.0)
    assert k == 0.5 and h == pytest.approx(5.0, abs=0.01)
    k2, _ = design_cusum(2.0, 465.0)
    assert k2 == 1.0
    lam, L = design_ewma(1.0, 500.0)
    assert (lam, round(L, 2)) == (0.1, 2.81)
    assert ewma_lambda(0.5) < ewma_lambda(1.0) < ewma_lambda(2.0) <= 0.25
    assert ewma_lambda(0.1) == 0.05
    with pytest.raises(ValueError):
        design_cusum(0.0, 100.0)
    with pytest.raises(ValueError):
        cusum_h(0.5, 1.0)


def test_arl0_for_rule():
    # One false alarm a month for 20 detectors at 10 s batches: each detector 20 x 30 days / 10 s.
    assert arl0_for(30 * 86400.0, 10.0, 20) == pytest.approx(20 * 30 * 86400 / 10)
    with pytest.raises(ValueError):
        arl0_for(0.0, 10.0)


def test_arl0_for_gives_the_line_its_false_alarm_interval_by_simulation():
    # Four CUSUM detectors designed from arl0_for share a line-wide false-alarm interval of 400 samples. Simulated, the
    # time to the line's first false alarm (the earliest of its four detectors, zero state) has a mean near 400 and
    # P(a false alarm within 400) near 1 - exp(-1) = 0.632, the rule's Poisson approximation. Tolerances: 4 standard
    # errors plus 5 % for the zero-state start (a CUSUM starting at zero is slower to its first false alarm than the
    # steady state the rule describes) and the near-geometric run-length distribution.
    interval, detectors, lines = 400.0, 4, 5000
    k, h = design_cusum(1.0, arl0_for(interval, 1.0, detectors))
    chart = TabularCusum(k, h)
    rng = np.random.default_rng(31)
    first = np.empty(lines)
    alive = np.arange(lines)
    t0 = 0
    while alive.size:
        stat = chart.update(rng.standard_normal((alive.size * detectors, 64))).reshape(alive.size, detectors, 64)
        hit = (stat > 1.0).any(axis=1)
        done = hit.any(axis=1)
        first[alive[done]] = t0 + hit[done].argmax(axis=1) + 1
        chart.keep(np.repeat(~done, detectors))
        alive = alive[~done]
        t0 += 64
    se = first.std(ddof=1) / np.sqrt(lines)
    assert abs(first.mean() - interval) <= 4 * se + 0.05 * interval
    p = (first <= interval).mean()
    assert abs(p - (1 - np.exp(-1))) <= 4 * np.sqrt(p * (1 - p) / lines) + 0.03
