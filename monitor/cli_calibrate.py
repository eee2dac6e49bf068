"""Commissioning commands on a recording: ``calibrate`` (each roll's effective stack caliper, the value to
configure) and ``traction-evidence`` (the tension ratio each driven roller has proven it holds without slip).

Both run the recording once through the checks (no history database) and print an 80-column table; the
physics is in :mod:`spanwatch.rules.calibration`, the pass in :mod:`spanwatch.monitor.calibrate`. Exit 2 on a
bad option, a config problem or a recording that cannot be read.
"""

import math
from pathlib import Path
from typing import Annotated

import typer
from spanwatch.monitor.cli import (
    SAFETY_NOTE,
    _one_of,
    app,
    check_plot,
    check_recording,
    console,
    err_console,
    fail,
    open_line,
)

RECORDING = "Recording: CSV long form (time,tag,value,quality; .gz ok) or .parquet."
CONFIG = "Line configuration (TOML)."
CORRELATED = 0.5  # lag-1 autocorrelation of the residuals above which a roll is flagged (common practice, no source)




def _gather(line, recording: Path, winders: list[str] | None, rollers: list[str] | None):  # noqa: ANN001
    from spanwatch.connectors.recording import RecordingError
    from spanwatch.monitor.calibrate import gather

    try:
        return gather(line, recording, winders=winders, rollers=rollers)
    except (RecordingError, ValueError, OSError) as exc:
        said = str(exc)
        fail(said if said.startswith(str(recording)) else f"{recording}: cannot read the recording: {said}")


def _say(text: str = "", *, indent: str = "") -> None:
    """One line, or a long one wrapped to 79 columns (continuations indented by ``indent``)."""
    import textwrap

    lines = textwrap.wrap(text, 79, subsequent_indent=indent, break_on_hyphens=False) if len(text) > 79 else [text]
    for ln in lines:
        console.print(ln, highlight=False, markup=False, soft_wrap=True)


@app.command("calibrate")
def calibrate_cmd(
    recording: Annotated[Path, typer.Argument(help=RECORDING)],
    config: Annotated[Path, typer.Option("--config", "-c", help=CONFIG)],
    winder: Annotated[str | None, typer.Option(help="Only this winder (its id); default every winder.")] = None,
    plot: Annotated[Path | None, typer.Option(help="Write the residual plot here (.png, .svg or .pdf).")] = None,
    confidence: Annotated[float, typer.Option(help="Confidence of the interval, e.g. 0.95.")] = 0.95,
) -> None:
    """Each roll's effective stack caliper from diameter and length, with its interval; the value to configure.

    Least squares of D^2 on length (D^2 = D0^2 +- (4/pi) h L; + rewind, - unwind), one roll at a time (a roll
    change splits them); the interval from the regression's standard error and Student's t, widened where the
    residuals are serially correlated.
    """
    import numpy as np
    from scipy import stats
    from spanwatch.monitor.calibrate import calibrate_rolls, plot_residuals, suggested_stack_factor
    from spanwatch.monitor.shifts import PlantClock

    if not 0.5 <= confidence < 1.0:
        fail(f"--confidence: expected a number from 0.5 to below 1 (e.g. 0.95), got {confidence}")
    line = open_line(config)
    ids = [w.id for w in line.model.winders_in_path]
    _one_of(winder, ids, "--winder")
    check_recording(recording)
    check_plot(plot)
    gathered = _gather(line, recording, [winder] if winder else None, [])
    rolls = calibrate_rolls(gathered, line, confidence=confidence)
    mat = line.model.material
    nominal = mat.caliper * mat.stack_factor
    clock = PlantClock.of(line.config)
    pct = f"{confidence * 100:g} %"
    _say(f"Effective stack caliper: {line.name}, {recording.name}")
    _say(f"nominal: caliper {mat.caliper * 1e6:.2f} um x stack_factor {mat.stack_factor:g} = {nominal * 1e6:.2f} um "
         f"(tolerance {mat.stack_factor_tolerance * 100:g} %)")
    if rolls:
        _say(f"times: {clock.tz}, from {clock.fmt(rolls[0].t0)}")
    _say()
    _say(f"{'winder':<10} {'roll':>4} {'from':>5} {'to':>5} {'length':>8} {'n':>7} {'caliper':>8} "
         f"{pct + ' interval':>15} {'vs nom':>7}")
    _say(f"{'':<10} {'':>4} {'':>5} {'':>5} {'m':>8} {'':>7} {'um':>8} {'um':>15} {'':>7}")
    notes: list[str] = []
    for r in rolls:
        span = f"{clock.fmt(r.t0, date_too=False):>5} {clock.fmt(r.t1, date_too=False):>5}"
        if r.fit is None:
            _say(f"{r.winder:<10} {r.roll:>4} {span} {'-':>8} {'-':>7} {'-':>8} {'-':>15} {'-':>7}")
            notes.append(f"{r.winder} roll {r.roll}: not calibrated: {r.why}")
            continue
        f = r.fit
        half = (f.ci[1] - f.ci[0]) / 2 * 1e6
        dg = 2 if not half < 0.05 else 3 if half >= 0.005 else 4  # enough digits to show the interval's width
        ci = f"{f.ci[0] * 1e6:.{dg}f}-{f.ci[1] * 1e6:.{dg}f}" if math.isfinite(f.stderr) else "-"
        dev = f.caliper / nominal - 1.0
        _say(f"{r.winder:<10} {r.roll:>4} {span} {r.length:>8.0f} {f.n:>7} {f.caliper * 1e6:>8.{dg}f} {ci:>15} "
             f"{dev * 100:>+6.1f}%")
        if f.r1 > CORRELATED:
            notes.append(f"{r.winder} roll {r.roll}: residuals serially correlated (lag-1 {f.r1:.2f}): the caliper "
                         f"changed within the roll or the sensor wanders; interval widened x{f.inflation:.1f}; "
                         "look at the residual plot")
        if abs(dev) > mat.stack_factor_tolerance:
            notes.append(f"{r.winder} roll {r.roll}: {dev * 100:+.1f} % from nominal, beyond the "
                         f"{mat.stack_factor_tolerance * 100:g} % stack_factor tolerance")
    if not rolls:
        notes.append("no roll with diameter and length signals in the recording")
    for n in notes:
        _say(f"note: {n}", indent="  ")
    fits = [r.fit for r in rolls if r.fit is not None and r.fit.stderr > 0 and math.isfinite(r.fit.stderr)]
    best = suggested_stack_factor(rolls, mat.caliper)
    if best is not None:
        h, sf = best
        _say()
        _say(f"Suggested (inverse-variance mean of {len(fits)} roll{'s' if len(fits) != 1 else ''}: "
             f"{h * 1e6:.2f} um, {(h / nominal - 1) * 100:+.1f} % against nominal):")
        if len(fits) > 1:
            z = np.array([(f.caliper - h) / f.stderr for f in fits])
            if float(z @ z) > stats.chi2.ppf(confidence, len(fits) - 1):
                _say("  the rolls differ beyond their intervals (a caliper change between rolls or lots):")
                _say("  calibrate per grade rather than paste one value for all")
        _say("[material]")
        _say(f"stack_factor = {sf:.3f}  # {h * 1e6:.2f} um ({h / 25.4e-6:.3f} mil) / {mat.caliper * 1e6:.2f} um "
             f"ply; was {mat.stack_factor:g}")
    if plot is not None:
        acc = {w.id: w.diameter_accuracy[0] for w in line.model.winders_in_path}
        try:
            plot_residuals(rolls, plot, accuracy=acc)
        except OSError as exc:
            fail(f"--plot: cannot write {plot}: {exc.strerror or exc}")
        err_console.print(f"residual plot: {plot}", highlight=False, markup=False)


@app.command("traction-evidence")
def traction_evidence_cmd(
    recording: Annotated[Path, typer.Argument(help=RECORDING)],
    config: Annotated[Path, typer.Option("--config", "-c", help=CONFIG)],
    roller: Annotated[str | None, typer.Option(help="Only this driven roller (its id); default every one.")] = None,
    window: Annotated[str, typer.Option(help="How long a ratio must be held to count, e.g. \"2 s\".")] = "2 s",
    plot: Annotated[Path | None, typer.Option(help="Write a plot of ln(T_high/T_low) over time here.")] = None,
) -> None:
    """The highest tension ratio each driven roller held without slip: a lower bound of its mu x wrap.

    Capstan (Euler-Eytelwein): holding T_high/T_low without slip proves ln(T_high/T_low) <= mu_eff x wrap.
    Counted only over a sustained window of frames where the traction check is valid, the roller's encoder
    shows no slip beyond the slip check's warning limit and its drive reports no fault.
    """
    from spanwatch.monitor import units as U
    from spanwatch.monitor.calibrate import traction_evidence
    from spanwatch.monitor.shifts import PlantClock

    try:
        win = U.to_si(window, U.TIME)
    except U.UnitError as exc:
        fail(f"--window: {exc}")
    if not 0.0 < win <= 3600.0:
        fail(f"--window: expected a duration above 0 and at most 1 h such as \"2 s\", got {window!r}")
    line = open_line(config)
    ids = [r.id for r in line.model.driven_rollers]
    _one_of(roller, ids, "--roller")
    check_recording(recording)
    check_plot(plot)
    gathered = _gather(line, recording, [], [roller] if roller else None)
    ev = traction_evidence(gathered, window=win, roller=(lambda rid: rid == roller) if roller else None)
    clock = PlantClock.of(line.config)
    _say(f"Traction evidence: {line.name}, {recording.name}")
    _say(f"held: the highest T_high/T_low held for {window} without slip; ln: its logarithm, <= mu_eff x wrap "
         "(capstan), so mu >= ln / wrap; mu*wrap cfg: configured COF x wrap (dry); derated: the same for the air "
         f"film at that moment's speed; margin: derated / ln (1/utilisation, as the traction check gives it; below 1 "
         f"the roller held more than the configuration allows); when: the window's end ({clock.tz}).")
    _say()
    _say(f"{'roller':<10} {'wrap':>5} {'COF':>5} {'held':>6} {'ln':>6} {'mu >=':>6} {'mu*wrap':>7} "
         f"{'derated':>7} {'margin':>6} {'when':>8}")
    _say(f"{'':<10} {'deg':>5} {'cfg':>5} {'ratio':>6} {'':>6} {'':>6} {'cfg':>7} {'cfg':>7} {'':>6} {'':>8}")
    notes: list[str] = []
    for e in ev:
        if not math.isfinite(e.held):
            _say(f"{e.roller:<10} {math.degrees(e.wrap):>5.0f} {e.cof:>5.2f} {'-':>6} {'-':>6} {'-':>6} "
                 f"{e.configured:>7.3f} {'-':>7} {'-':>6} {'-':>8}")
            notes.append(f"{e.roller}: no {window} without slip where the traction check was valid")
            continue
        margin = e.configured_eff / e.held if e.held > 0 else math.inf
        when = clock.fmt(e.at, seconds=True, date_too=False)
        _say(f"{e.roller:<10} {math.degrees(e.wrap):>5.0f} {e.cof:>5.2f} {math.exp(e.held):>6.3f} {e.held:>6.3f} "
             f"{e.mu_lower:>6.3f} {e.configured:>7.3f} {e.configured_eff:>7.3f} {margin:>5.2f}x {when:>8}")
        if not e.encoder:
            notes.append(f"{e.roller}: no encoder of its own, so slip could not be seen: not proven")
        if e.held > e.configured_eff:
            notes.append(f"{e.roller}: held more than the configured COF allows at that speed: the configured "
                         "COF is conservative, or a load cell reads wrong")
    for n in notes:
        _say(f"note: {n}", indent="  ")
    _say()
    _say("A lower bound only: the roller may hold more; it says nothing of a higher ratio or speed.")
    _say(SAFETY_NOTE)
    if plot is not None:
        try:
            _plot_traction(gathered, ev, plot, clock)
        except OSError as exc:
            fail(f"--plot: cannot write {plot}: {exc.strerror or exc}")
        err_console.print(f"traction plot: {plot}", highlight=False, markup=False)


def _plot_traction(gathered, ev, path: Path, clock) -> None:  # noqa: ANN001
    """ln(T_high/T_low) over time per roller (frames that counted dark), the held value and mu_eff x wrap."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import numpy as np

    n = max(1, len(ev))
    fig, axes = plt.subplots(n, 1, figsize=(8, 2.4 * n + 0.6), squeeze=False)
    for ax, e in zip(axes[:, 0], ev, strict=False):
        ser = gathered.rollers[e.roller]
        t, up, down = ser.get("t"), ser.get("up"), ser.get("down")
        ok = ser.get("valid").astype(bool) & ser.get("grip").astype(bool)
        with np.errstate(all="ignore"):
            lnr = np.abs(np.log(down / up))
        m = (t - t[0]) / 60.0 if t.size else t
        step = max(1, t.size // 20_000)
        ax.plot(m[::step], np.where(ok, np.nan, lnr)[::step], ".", ms=1, color="0.7", label="not counted")
        ax.plot(m[::step], np.where(ok, lnr, np.nan)[::step], ".", ms=1, color="tab:blue", label="no slip, valid")
        ax.plot(m[::step], (ser.get("mu_eff") * e.wrap)[::step], "-", lw=0.8, color="tab:red",
                label="configured mu_eff x wrap")
        if math.isfinite(e.held):
            ax.axhline(e.held, color="tab:green", lw=0.8, ls="--", label="held (lower bound)")
        ax.set_title(f"{e.roller}: ln(T_high/T_low)", fontsize=9)
        ax.legend(fontsize=7, loc="upper right")
    start = clock.fmt(float(gathered.rollers[ev[0].roller].get("t")[0])) if ev else ""
    axes[-1, 0].set_xlabel(f"minutes from {start}")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
