"""Effective caliper calibration and traction evidence: against a reference library, published examples and the
simulator's ground truth (the caliper and COF it simulated, which the monitor never sees)."""

from __future__ import annotations

import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from spanwatch.monitor.calibrate import calibrate_rolls, gather, traction_evidence
from spanwatch.monitor.line import load_line
from spanwatch.monitor.simline import SimulatedLine
from spanwatch.monitor.simline.scenario import parse_scenario
from spanwatch.monitor.simulate import simulate_to_file
from spanwatch.rules.calibration import fit_caliper, held_ratio, line_fit

ROOT = Path(__file__).resolve().parent.parent
CONFIG = ROOT / "config" / "quillmere-q2.toml"


def simulated(tmp: Path, name: str, data: dict) -> tuple[Path, SimulatedLine]:
    """Simulate a scenario (a dict as its TOML would give) to a recording; return it and the simulator."""
    data = {**data, "scenario": {"name": name, "config": str(CONFIG), **data["scenario"]}}
    sc, cfg = parse_scenario(data, tmp / f"{name}.toml")
    sim = SimulatedLine(load_line(cfg), sc)
    out = tmp / f"{name}.csv.gz"
    simulate_to_file(sim, out, progress=False)
    return out, sim


@pytest.fixture(scope="module")
def between_rolls(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, SimulatedLine]:
    """A rewind roll change at 150 s, and from it a web 10 % thicker (a caliper change between rolls)."""
    return simulated(tmp_path_factory.mktemp("cal"), "between", {
        "scenario": {"duration": "5 min", "seed": 31},
        "speed": [{"at": "0 s", "to": "400 m/min"}],
        "roll_change": [{"at": "150 s", "winder": "rewind"}],
        "fault": [{"kind": "caliper_change", "target": "rewind", "start": "150 s", "end": "300 s", "size": "10 %"}],
    })


@pytest.fixture(scope="module")
def low_cof(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, SimulatedLine]:
    """The true COF of every roller a quarter of the configured one: pull_1 works at its capstan limit."""
    return simulated(tmp_path_factory.mktemp("cof"), "lowcof", {
        "scenario": {"duration": "3 min", "seed": 41},
        "speed": [{"at": "0 s", "to": "400 m/min"}],
        "truth": {"cof_factor": 0.25},
    })


# --- the regression against a reference library and a published example -----------------------------------


def test_line_fit_matches_scipy_linregress() -> None:
    # reference library: scipy.stats.linregress (slope, intercept and the standard error of the slope)
    rng = np.random.default_rng(5)
    x = np.linspace(0.0, 3000.0, 500)
    y = 0.0058 + 4.0e-8 * x + rng.normal(0.0, 2e-6, x.size)
    a, b, se, _ = line_fit(x, y)
    ref = stats.linregress(x, y)
    assert b == pytest.approx(ref.slope, rel=1e-9)
    assert a == pytest.approx(ref.intercept, rel=1e-9)
    assert se == pytest.approx(ref.stderr, rel=1e-7)


def test_line_fit_anscombe_quartet_first_set() -> None:
    # F. J. Anscombe, "Graphs in Statistical Analysis", The American Statistician 27(1):17-21, 1973: every set of
    # the quartet has the regression line y = 3.00 + 0.500 x; the standard error of the slope of set I, 0.118,
    # is from memory (the usual printout of this data set) and checked here against numpy.polyfit's covariance.
    x = np.array([10, 8, 13, 9, 11, 14, 6, 4, 12, 7, 5], dtype=float)
    y = np.array([8.04, 6.95, 7.58, 8.81, 8.33, 9.96, 7.24, 4.26, 10.84, 4.82, 5.68])
    a, b, se, _ = line_fit(x, y)
    assert a == pytest.approx(3.00, abs=0.005)
    assert b == pytest.approx(0.500, abs=0.0005)
    assert se == pytest.approx(0.118, abs=0.0005)
    coef, cov = np.polyfit(x, y, 1, cov="unscaled")
    resid = y - np.polyval(coef, x)
    assert se == pytest.approx(math.sqrt(cov[0, 0] * (resid @ resid) / (x.size - 2)), rel=1e-9)


def test_line_fit_refuses_too_little() -> None:
    with pytest.raises(ValueError, match="at least 3"):
        line_fit([1.0, 2.0], [1.0, 2.0])
    with pytest.raises(ValueError, match="spread"):
        line_fit([1.0, 1.0, 1.0], [1.0, 2.0, 3.0])


def test_caliper_fit_recovers_a_known_roll_and_its_interval_covers_it() -> None:
    # a rewind built by conservation of annulus area (Roisum, The Mechanics of Winding, 1994) with white diameter
    # noise: 95 % intervals over 200 independent rolls cover the true caliper about 95 % of the time
    # (binomial: 200 x 0.95 +- 3 sigma = 181 .. 199); the same for an unwind (L paid out, D shrinking)
    rng = np.random.default_rng(11)
    h, dc, d0 = 31.7e-6, 0.0762, 0.85
    length = np.linspace(0.0, 2000.0, 400)
    for rewind, start, sign in ((True, dc, 1.0), (False, d0, -1.0)):
        covered = 0
        for _ in range(200):
            d = np.sqrt(start**2 + sign * 4.0 * h * length / np.pi) + rng.normal(0.0, 3e-4, length.size)
            f = fit_caliper(length, d, rewind=rewind, correlated=False)
            covered += f.ci[0] <= h <= f.ci[1]
        assert 181 <= covered <= 199, (rewind, covered)
        assert f.d0 == pytest.approx(start, abs=1e-3)


def test_caliper_interval_is_student_t() -> None:
    # the interval's half-width is t(0.975, n - 2) standard errors (scipy.stats.t as the reference quantile);
    # for n = 12 the table value t(0.975, 10) = 2.228 (any t table, e.g. NIST/SEMATECH e-Handbook of Statistical
    # Methods, section 1.3.6.7.2)
    rng = np.random.default_rng(2)
    length = np.linspace(0.0, 500.0, 12)
    d = np.sqrt(0.0762**2 + 4.0 * 30e-6 * length / np.pi) + rng.normal(0.0, 2e-4, 12)
    f = fit_caliper(length, d, rewind=True, correlated=False)
    assert (f.ci[1] - f.caliper) / f.stderr == pytest.approx(2.228, abs=0.001)


# --- on the simulated line -------------------------------------------------------------------------------------


def test_calibration_recovers_the_simulated_caliper_across_a_change_between_rolls(between_rolls) -> None:
    rec, sim = between_rolls
    line = load_line(CONFIG)
    rolls = [r for r in calibrate_rolls(gather(line, rec), line) if r.fit is not None]
    true_first = sim.caliper  # the simulator's effective caliper (config caliper x its true stack factor)
    true_second = sim.caliper * 1.10  # the caliper_change fault of the scenario, from the roll change on
    unwind = [r for r in rolls if r.winder == "unwind"]
    rewind = [r for r in rolls if r.winder == "rewind"]
    assert len(unwind) == 1 and len(rewind) == 2
    for r, truth in ((unwind[0], true_first), (rewind[0], true_first), (rewind[1], true_second)):
        assert r.fit is not None
        assert r.fit.ci[0] <= truth <= r.fit.ci[1], (r.winder, r.roll, r.fit.caliper, r.fit.ci, truth)
        assert r.fit.ci[1] - r.fit.ci[0] < 0.01 * truth  # a useful interval, not a wide one that covers anything
    # the change between rolls is seen: the two rewind intervals are apart
    assert rewind[0].fit.ci[1] < rewind[1].fit.ci[0]


def test_traction_evidence_never_exceeds_the_true_capacity(low_cof) -> None:
    rec, sim = low_cof
    line = load_line(CONFIG)
    ev = {e.roller: e for e in traction_evidence(gather(line, rec, winders=[]), window=2.0)}
    true = {d.id: d.mu * d.wrap for d in sim.driven}  # the simulator's dry mu x wrap (cof_factor applied)
    assert set(ev) == set(true)
    for rid, e in ev.items():
        assert math.isfinite(e.held)
        assert e.held <= true[rid], (rid, e.held, true[rid])
        assert e.mu_lower <= sim.driven[[d.id for d in sim.driven].index(rid)].mu
        # at speed the air film derates the COF (Knox & Sweeney 1971; Ducotey & Good 1999); in the simulator's linear
        # model the derating is a factor on mu, so the true mu_eff x wrap at that moment is the configured derated
        # one times the cof_factor (2 % allowed for the monitor computing its film from measured, noisy tensions)
        assert e.held <= 1.02 * e.mu_eff * e.wrap * 0.25, (rid, e.held, e.mu_eff * e.wrap * 0.25)
    # pull_1 works at its limit all along (true mu 0.15): what it is seen to hold comes close to what it can
    assert ev["pull_1"].held >= 0.9 * true["pull_1"]


def test_held_ratio_euler_eytelwein_handbook_value() -> None:
    # Euler-Eytelwein belt friction T2/T1 = exp(mu beta): mu = 0.3 over 180 deg holds 2.566 (J. L. Meriam and
    # L. G. Kraige, Engineering Mechanics: Statics, belt friction section; ASTM G143 computes web/roller COF from
    # the same relation). A roller seen holding 2.566 for the whole window proves mu >= 0.300 at 180 deg wrap.
    t = np.arange(0.0, 5.0, 0.02)
    low = np.full(t.size, 100.0)
    high = np.where((t >= 1.0) & (t < 4.0), 256.6, 150.0)
    high[(t >= 4.2) & (t < 4.5)] = 400.0  # a spike shorter than the window: proves nothing
    held, k = held_ratio(t, np.log(high / low), np.ones(t.size, bool), 2.0)
    assert math.exp(held) == pytest.approx(2.566, abs=0.001)
    assert held / math.pi == pytest.approx(0.300, abs=0.0005)
    assert 3.0 <= t[k] < 4.0
    # frames that are not valid (slip seen) break the window: nothing held for 2 s
    ok = np.ones(t.size, bool)
    ok[::50] = False
    assert math.isnan(held_ratio(t, np.log(high / low), ok, 2.0)[0])


# --- the command line ------------------------------------------------------------------------------------------


def cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "spanwatch", *args], cwd=ROOT, capture_output=True, text=True,
                          timeout=300, env={**os.environ, "COLUMNS": "80"})


def test_calibrate_command_table_and_plot(between_rolls, tmp_path: Path) -> None:
    rec, _ = between_rolls
    png = tmp_path / "cal.png"
    proc = cli("calibrate", str(rec), "--config", str(CONFIG), "--plot", str(png))
    assert proc.returncode == 0, proc.stderr
    assert all(len(ln) <= 80 for ln in proc.stdout.splitlines()), proc.stdout
    assert "stack_factor = " in proc.stdout and "[material]" in proc.stdout
    assert "differ beyond their intervals" in proc.stdout
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_traction_evidence_command(low_cof, tmp_path: Path) -> None:
    rec, _ = low_cof
    proc = cli("traction-evidence", str(rec), "--config", str(CONFIG), "--roller", "pull_1",
               "--plot", str(tmp_path / "t.png"))
    assert proc.returncode == 0, proc.stderr
    assert all(len(ln) <= 80 for ln in proc.stdout.splitlines()), proc.stdout
    assert "pull_1" in proc.stdout and "pull_2" not in proc.stdout
    assert "not a safety function" in " ".join(proc.stdout.split())


@pytest.mark.parametrize("args, says", [
    (["calibrate", "missing.csv.gz", "--config", str(CONFIG)], "no such recording"),
    (["calibrate", "{rec}", "--config", str(CONFIG), "--winder", "rewnd"], "--winder: expected one of"),
    (["calibrate", "{rec}", "--config", str(CONFIG), "--confidence", "1.5"], "--confidence"),
    (["calibrate", "{rec}", "--config", str(CONFIG), "--plot", "cal.txt"], "--plot"),
    (["calibrate", "{rec}", "--config", "nowhere.toml"], "nowhere.toml"),
    (["traction-evidence", "{rec}", "--config", str(CONFIG), "--window", "2"], "--window"),
    (["traction-evidence", "{rec}", "--config", str(CONFIG), "--roller", "idler_1"], "--roller"),
])
def test_errors_exit_2(low_cof, args: list[str], says: str) -> None:
    rec, _ = low_cof
    proc = cli(*[a.replace("{rec}", str(rec)) for a in args])
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert "Traceback" not in proc.stderr
    assert says in proc.stderr
