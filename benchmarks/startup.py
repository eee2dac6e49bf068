"""Start-up time of the ``spanwatch`` command, against Python itself and against ``import numpy``.

Usage: python benchmarks/startup.py [--runs 20] [--spanwatch PATH]

Times, best of ``--runs`` after one warm-up run (hyperfine when it is installed, else rounds of
subprocess runs, one of each command per round, timed with ``time.perf_counter``; a command that
exits non-zero, such as ``--version`` on a version without it, is timed all the same and marked with
its exit status):

* ``python -c pass`` and ``python -c "import numpy"`` (the interpreter next to the spanwatch command),
* ``python -c "import typer"`` and ``python -c "import rich.console"`` (what the command line itself needs),
* ``spanwatch --version``, ``spanwatch --help`` and ``spanwatch check-config <the example line>``,
* ``spanwatch --help`` with typer's plain help instead of its rich panels (``TYPER_USE_RICH=0``),
  which shows what the rich help costs,

and prints each with its ratio to the numpy import measured in the same run.

Two bytecode settings are measured, because this environment sets ``PYTHONDONTWRITEBYTECODE=1``:

* ``no .pyc written``: ``PYTHONDONTWRITEBYTECODE=1`` as here. Installed packages keep the ``.pyc``
  files pip wrote at install time, but an editable install's own modules (spanwatch's source tree)
  are compiled from source on every run.
* ``.pyc cached``: the variable unset and ``PYTHONPYCACHEPREFIX`` pointed at a temporary folder, so
  every module is compiled once (in the warm-up run) and read from the cache afterwards, and nothing
  is written into the source tree or site-packages. This is what an ordinary installation sees.

Target (issue 7): ``spanwatch --help`` and ``spanwatch --version`` at most 2x ``import numpy``.
Figures are printed; nothing is asserted.
"""

from __future__ import annotations

import argparse
import json
import os
import shlex
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def best_of(commands: list[tuple[str, list[str]]], env: dict[str, str], runs: int,
            hyperfine: str | None) -> dict[str, tuple[float, int]]:
    """Best wall time in seconds of each command over ``runs`` runs, after one warm-up run; and its exit status.

    Without hyperfine the commands take turns (one run of each per round), so a burst of load from other
    processes on the machine falls on all of them alike instead of on whichever command was running.
    """
    status = {label: subprocess.run(cmd, env=env, capture_output=True).returncode for label, cmd in commands}
    best = dict.fromkeys(status, float("inf"))
    if hyperfine:
        for label, cmd in commands:
            with tempfile.NamedTemporaryFile(suffix=".json") as out:
                subprocess.run([hyperfine, "-N", "-i", "--runs", str(runs), "--export-json", out.name, "--",
                                shlex.join(cmd)], env=env, check=True, capture_output=True)
                best[label] = float(json.loads(Path(out.name).read_text())["results"][0]["min"])
    else:
        for _ in range(runs):
            for label, cmd in commands:
                t = time.perf_counter()
                subprocess.run(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
                best[label] = min(best[label], time.perf_counter() - t)
    return {label: (best[label], status[label]) for label in status}


def example_line(spanwatch: str, env: dict[str, str]) -> str:
    """The installed example line (``spanwatch examples --path``), or this checkout's file for older versions."""
    proc = subprocess.run([spanwatch, "examples", "--path", "quillmere-q2.toml"], env=env, capture_output=True,
                          text=True)
    if proc.returncode == 0 and proc.stdout.strip():
        return proc.stdout.strip()
    return str(ROOT / "config" / "quillmere-q2.toml")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--runs", type=int, default=20, help="runs per command; the best is reported")
    ap.add_argument("--spanwatch", default=str(Path(sys.executable).with_name("spanwatch")),
                    help="the spanwatch command to time (default: the one beside this Python)")
    args = ap.parse_args()

    spanwatch = shutil.which(args.spanwatch) or args.spanwatch
    if not Path(spanwatch).is_file():
        ap.error(f"--spanwatch: no such command {args.spanwatch!r}")
    python = str(Path(spanwatch).with_name("python"))
    if not Path(python).exists():
        python = sys.executable
    hyperfine = shutil.which("hyperfine")
    base_env = {k: v for k, v in os.environ.items() if k not in ("PYTHONDONTWRITEBYTECODE", "PYTHONPYCACHEPREFIX")}
    example = example_line(spanwatch, base_env)
    commands = [
        ("python -c pass", [python, "-c", "pass"]),
        ('python -c "import numpy"', [python, "-c", "import numpy"]),
        ('python -c "import typer"', [python, "-c", "import typer"]),
        ('python -c "import rich.console"', [python, "-c", "import rich.console"]),
        ("spanwatch --version", [spanwatch, "--version"]),
        ("spanwatch --help", [spanwatch, "--help"]),
        ("spanwatch --help, plain (TYPER_USE_RICH=0)", ["env", "TYPER_USE_RICH=0", spanwatch, "--help"]),
        ("spanwatch check-config quillmere-q2.toml", [spanwatch, "check-config", example]),
    ]
    version = subprocess.run([spanwatch, "--version"], env=base_env, capture_output=True, text=True).stdout.strip()
    print(f"{version or spanwatch} ({spanwatch}); Python {sys.version.split()[0]}; {os.cpu_count()} CPUs; "
          f"best of {args.runs} runs by {'hyperfine' if hyperfine else 'rounds of subprocess runs'}; example {example}")

    with tempfile.TemporaryDirectory(prefix="spanwatch-pycache-") as cache:
        settings = {
            "no .pyc written (PYTHONDONTWRITEBYTECODE=1)": {**base_env, "PYTHONDONTWRITEBYTECODE": "1"},
            ".pyc cached (PYTHONPYCACHEPREFIX)": {**base_env, "PYTHONPYCACHEPREFIX": cache},
        }
        results: dict[str, dict[str, tuple[float, int]]] = {}
        for name, env in settings.items():
            results[name] = best_of(commands, env, args.runs, hyperfine)

    names = list(settings)
    rows = [["command", *names]]
    for label, _ in commands:
        row = [label]
        for n in names:
            (t, status), ref = results[n][label], results[n]['python -c "import numpy"'][0]
            row.append(f"{t * 1000:.0f} ms, {t / ref:.2f}x numpy" + (f" (exit {status})" if status else ""))
        rows.append(row)
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    print()
    for k, r in enumerate(rows):
        print("| " + " | ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)) + " |")
        if k == 0:
            print("|" + "|".join("-" * (w + 2) for w in widths) + "|")
    print()
    for n in names:
        ref = results[n]['python -c "import numpy"'][0]
        worst = max(results[n]["spanwatch --version"][0], results[n]["spanwatch --help"][0])
        print(f"{n}: --help and --version at most {worst / ref:.2f}x import numpy (target 2x: "
              f"{'met' if worst <= 2 * ref else 'NOT met'})")

if __name__ == "__main__":
    main()
