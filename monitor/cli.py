"""The ``spanwatch`` command line (typer + rich).

Exit codes: 0 success, 1 the command ran but found a problem it was asked to find,
2 usage or configuration error (the message names the file, the key and what was expected).
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console
from rich.table import Table

from monitor import units as U
from monitor.checkset import alarm_points, build_checks
from monitor.config import ConfigError
from monitor.line import Line, load_line

app = typer.Typer(
    name="spanwatch",
    help="Streaming monitor for web-handling lines: traction, slip, draw, roll build and sensor health. "
    "Advisory only: not a safety function.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)
# Piped output (logs, CI, files) gets a fixed, wide layout; a terminal gets its own width.
console = Console(width=None if sys.stdout.isatty() else 140)
err_console = Console(stderr=True, width=None if sys.stderr.isatty() else 140)

SAFETY_NOTE = (
    "spanwatch is advisory: it is not a safety function and does not replace guarding, safety-rated "
    "controls or lock-out. Defer to local codes and qualified practice."
)


@app.callback()
def _root() -> None:
    """spanwatch: streaming monitor for web-handling lines (advisory only; not a safety function)."""


def fail_config(exc: ConfigError) -> None:
    """Print a configuration error and exit with status 2."""
    err_console.print(f"[bold red]configuration error[/]\n{exc}", highlight=False, markup=True)
    raise typer.Exit(code=2)


def open_line(path: Path) -> Line:
    """Load a line and its alarm settings, exiting with status 2 on any config problem."""
    try:
        line = load_line(path)
        alarm_points(line, build_checks(line))
    except ConfigError as exc:
        fail_config(exc)
    return line


def _tension(v: float | None) -> str:
    if v is None:
        return "-"
    return f"{v:.0f} N/m ({U.from_si(v, 'pli'):.2f} pli)"


def _speed(v: float) -> str:
    return f"{U.from_si(v, 'm/min'):.0f} m/min ({U.from_si(v, 'fpm'):.0f} fpm)"


@app.command("check-config")
def check_config(
    file: Annotated[Path, typer.Argument(help="Line configuration (TOML).")],
) -> None:
    """Validate a line configuration and print the derived line and each driven roller's capacity."""
    line = open_line(file)
    cfg = line.config
    lw, mat = cfg.line, cfg.material
    console.print(f"[bold]{lw.name}[/]  {lw.plant}   config {file} (hash {line.config_hash})")
    console.print(f"material: {mat.name}; caliper {U.from_si(mat.caliper, 'um'):.1f} um "
                  f"({U.from_si(mat.caliper, 'thou'):.2f} mil), width {U.from_si(mat.width, 'mm'):.0f} mm, "
                  f"E {mat.modulus / 1e9:.2f} GPa; top speed {_speed(lw.max_speed)}")
    console.print("web path: " + " -> ".join(
        f"[bold]{e}[/]" if line.elements[e].driven else e for e in line.path), highlight=False)

    zt = Table(title="Tension zones (spans between driven elements)", title_justify="left")
    for col in ("zone", "spans", "length", "tension tag", "setpoint"):
        zt.add_column(col)
    for z in line.zones:
        sp = line.zone_setpoints(z)
        setpoint = " -> ".join(_tension(s) for s in sp) if sp else "-"
        zt.add_row(z.id, ", ".join(z.spans), f"{z.length:.2f} m", z.tension_tag or "-", setpoint)
    console.print(zt)

    ct = Table(title="Driven-roller traction capacity: largest tension ratio held (capstan equation; "
                     "air film by Knox–Sweeney)", title_justify="left")
    for col in ("roller", "at", "mu_eff", "air film", "max ratio", "safe ratio", "demanded", "share of safe"):
        ct.add_column(col, justify="right" if col not in ("roller", "at") else "left")
    for el in line.driven_rollers:
        sec = el.section
        for label, speed in (("standstill", 0.0), (f"top speed {U.from_si(lw.max_speed, 'm/min'):.0f} m/min",
                                                   lw.max_speed)):
            cap = line.roller_capacity(el.id, speed)
            share = cap["share_of_safe"]
            colour = "red" if share >= 1 else "yellow" if share >= 0.8 else "green"
            ct.add_row(f"{el.id}: wrap {U.from_si(sec.wrap, 'deg'):.0f} deg, mu {cap['mu']:.2f}, SF "
                       f"{sec.safety_factor:g}" if speed == 0 else "", label, f"{cap['mu_eff']:.3f}",
                       f"{cap['air_film'] * 1e6:.2f} um", f"{cap['max_ratio']:.2f}", f"{cap['safe_ratio']:.2f}",
                       f"{cap['demanded_ratio']:.2f}", f"[{colour}]{share:.2f}[/]")
    console.print(ct)
    console.print(f"air model: {lw.air_film_model}, speed convention: {lw.air_speed_convention}, "
                  f"air viscosity {line.viscosity:.4g} Pa s at {lw.air_temperature - 273.15:.1f} degC")

    checks = build_checks(line)
    points = alarm_points(line, checks)
    kinds: dict[str, list[str]] = {}
    rests: dict[str, str] = {}
    for c in checks:
        kinds.setdefault(c.kind, []).append(c.object_id)
        rests[c.kind] = type(c).rests_on
    kt = Table(title=f"Checks ({len(checks)}) and alarm points ({len(points)})", title_justify="left")
    for col in ("check", "objects", "rests on"):
        kt.add_column(col)
    for kind, objs in kinds.items():
        shown = ", ".join(objs) if len(objs) <= 4 else f"{len(objs)} tags"
        kt.add_row(kind, shown, rests[kind])
    console.print(kt)
    console.print(f"[dim]{SAFETY_NOTE}[/]")


def main() -> None:
    """Console-script entry point."""
    try:
        app()
    except KeyboardInterrupt:
        sys.exit(130)


if __name__ == "__main__":
    main()
