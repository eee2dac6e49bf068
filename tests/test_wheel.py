"""The installed wheel works on its own: one top-level name, examples as package data, ``spanwatch demo``
from an empty folder in a fresh virtual environment beside foreign ``rules`` and ``connectors`` distributions.

References for what is checked:

* the wheel layout (top-level names, ``*.dist-info/RECORD``, ``WHEEL``, ``METADATA``) — PyPA "Binary
  distribution format" specification (originally PEP 427) and "Recording installed projects" (PEP 376);
* console scripts — PyPA "Entry points specification" (``entry_points.txt``, group ``console_scripts``);
* how the fresh environment sees the test environment's dependencies — the Python standard library
  documentation of :mod:`site`: a ``.pth`` file in site-packages appends its lines to ``sys.path`` after
  site-packages, and ``.pth`` files inside a directory added that way are not processed (so the test
  environment's editable spanwatch finder stays out, and the fresh environment imports the wheel).

Nothing here is downloaded at run time except, when the test environment's setuptools is older than
pyproject.toml's ``setuptools>=77``, the isolated build environment pip makes for the wheel. The test never
skips (CI=true or not): it needs no service, only this interpreter.
"""

from __future__ import annotations

import base64
import hashlib
import os
import re
import shutil
import subprocess
import sys
import sysconfig
import zipfile
from importlib.metadata import version as dist_version
from pathlib import Path

import pytest
from spanwatch.monitor.cli import app
from typer.testing import CliRunner

REPO = Path(__file__).resolve().parents[1]
# What a build must never see: environments, caches and an earlier build's leftovers (a stale build/lib
# would put files that were moved or deleted back into the wheel).
SKIP = shutil.ignore_patterns(".venv", "venv", ".git", "build", "dist", "*.egg-info", "__pycache__", ".pytest_cache",
                              ".ruff_cache", ".hypothesis", "*.db", "*.db-wal", "*.db-shm", "out")

FOREIGN = {
    "rules": {
        "rules/__init__.py": 'OWNER = "the foreign rules distribution"\n',
        "rules/airfilm.py": 'raise ImportError("rules.airfilm of the foreign rules distribution: spanwatch code must '
                            'import spanwatch.rules.airfilm")\n',
    },
    "connectors": {
        "connectors/__init__.py": 'OWNER = "the foreign connectors distribution"\n',
        "connectors/opcua.py": 'raise ImportError("connectors.opcua of the foreign connectors distribution: spanwatch '
                               'code must import spanwatch.connectors.opcua")\n',
    },
}


def run(cmd: list[str | Path], **kw: object) -> subprocess.CompletedProcess:
    """Run a command; fail with its output unless it exits 0."""
    proc = subprocess.run([str(c) for c in cmd], capture_output=True, text=True, timeout=600, **kw)  # type: ignore[call-overload]
    assert proc.returncode == 0, f"{' '.join(map(str, cmd))} exited {proc.returncode}:\n{proc.stdout}\n{proc.stderr}"
    return proc


def _record_hash(data: bytes) -> str:
    return "sha256=" + base64.urlsafe_b64encode(hashlib.sha256(data).digest()).rstrip(b"=").decode()


def tiny_wheel(out: Path, dist: str, files: dict[str, str], version: str = "1.0") -> Path:
    """A pure-Python wheel of ``files`` (PyPA binary distribution format), written by hand: no build backend."""
    info = f"{dist}-{version}.dist-info"
    entries = {path: text.encode() for path, text in files.items()}
    entries[f"{info}/METADATA"] = f"Metadata-Version: 2.1\nName: {dist}\nVersion: {version}\n".encode()
    entries[f"{info}/WHEEL"] = (b"Wheel-Version: 1.0\nGenerator: spanwatch-tests\nRoot-Is-Purelib: true\n"
                                b"Tag: py3-none-any\n")
    record = [f"{p},{_record_hash(d)},{len(d)}" for p, d in entries.items()] + [f"{info}/RECORD,,"]
    entries[f"{info}/RECORD"] = ("\n".join(record) + "\n").encode()
    path = out / f"{dist}-{version}-py3-none-any.whl"
    with zipfile.ZipFile(path, "w") as z:
        for name, data in entries.items():
            z.writestr(name, data)
    return path


def _version_at_least(text: str, wanted: tuple[int, ...]) -> bool:
    parts = tuple(int(x) for x in re.findall(r"\d+", text)[: len(wanted)])
    return parts >= wanted


@pytest.fixture(scope="module")
def wheel(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The spanwatch wheel built from a copy of this worktree (pip, setuptools backend)."""
    base = tmp_path_factory.mktemp("wheel")
    src, out = base / "src", base / "dist"
    shutil.copytree(REPO, src, ignore=SKIP)
    cmd = [sys.executable, "-m", "pip", "wheel", "--no-deps", "--quiet", "-w", str(out), str(src)]
    if _version_at_least(dist_version("setuptools"), (77,)):  # pyproject.toml: requires = ["setuptools>=77"]
        cmd.insert(cmd.index("--no-deps"), "--no-build-isolation")
    run(cmd)
    found = sorted(out.glob("spanwatch-*.whl"))
    assert len(found) == 1, found
    return found[0]


def test_wheel_holds_one_top_level_name_and_the_examples(wheel):
    with zipfile.ZipFile(wheel) as z:
        names = z.namelist()
        info = next(n.split("/")[0] for n in names if n.endswith(".dist-info/RECORD"))
        record = z.read(f"{info}/RECORD").decode().splitlines()
        metadata = z.read(f"{info}/METADATA").decode()
        entry_points = z.read(f"{info}/entry_points.txt").decode()
    assert {n.split("/")[0] for n in names} == {"spanwatch", info}
    # RECORD lists every file of the wheel (itself included), and nothing else
    assert {r.rsplit(",", 2)[0] for r in record if r} == set(names)
    version = re.search(r"^Version: (.+)$", metadata, re.M).group(1)  # type: ignore[union-attr]
    assert info == f"spanwatch-{version}.dist-info"
    assert re.search(r"^spanwatch\s*=\s*spanwatch\.monitor\.cli:main$", entry_points, re.M), entry_points
    # every example of the source folder config/ ships as package data of spanwatch.examples
    shipped = {p.relative_to(REPO / "config").as_posix() for p in (REPO / "config").rglob("*")
               if p.suffix in (".toml", ".service")}
    assert shipped and {f"spanwatch/examples/{s}" for s in shipped} <= set(names)
    assert not [n for n in names if "__pycache__" in n or n.endswith(".pyc")]


@pytest.fixture(scope="module")
def fresh_venv(wheel: Path, tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """A new virtual environment holding foreign ``rules`` and ``connectors`` distributions, then the wheel.

    The dependencies (numpy, asyncua, ...) come from this test environment through a ``.pth`` file, so
    nothing is downloaded; pip installs into the new environment with ``--python`` and ``--no-index``.
    """
    base = tmp_path_factory.mktemp("fresh")
    env_dir, wheels = base / "venv", base / "wheels"
    wheels.mkdir()
    run([sys.executable, "-m", "venv", "--without-pip", env_dir])
    py = env_dir / "bin" / "python"
    purelib = Path(run([py, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"]).stdout.strip())
    ours = {sysconfig.get_paths()["purelib"], sysconfig.get_paths()["platlib"]}
    (purelib / "spanwatch-test-dependencies.pth").write_text("\n".join(sorted(ours)) + "\n", encoding="utf-8")
    foreign = [tiny_wheel(wheels, dist, files) for dist, files in FOREIGN.items()]
    pip = [sys.executable, "-m", "pip", "--python", py, "install", "--no-deps", "--no-index", "--quiet"]
    run([*pip, *foreign])
    run([*pip, wheel])
    return {"python": py, "bin": env_dir / "bin", "purelib": purelib}


def _env() -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME", "VIRTUAL_ENV")}
    env["COLUMNS"] = "200"
    return env


def test_fresh_venv_imports_the_wheel_not_the_source_tree(fresh_venv, tmp_path):
    probe = ("import sys, importlib.resources as r, spanwatch, spanwatch.monitor.cli, spanwatch.monitor.demo, "
             "spanwatch.connectors.opcua_server\n"
             "print(spanwatch.__file__); print(spanwatch.monitor.cli.__file__); print(r.files('spanwatch.examples'))\n"
             "print('rules' in sys.modules, 'connectors' in sys.modules)")
    out = run([fresh_venv["python"], "-c", probe], env=_env(), cwd=tmp_path).stdout.split("\n")
    where = fresh_venv["purelib"] / "spanwatch"
    assert Path(out[0]) == where / "__init__.py"
    assert Path(out[1]) == where / "monitor" / "cli.py"
    assert Path(out[2]) == where / "examples"
    assert out[3] == "False False", "spanwatch imported a top-level rules or connectors package"


def test_foreign_rules_and_connectors_are_intact(fresh_venv, tmp_path):
    # run from an empty folder: "python -c" puts the working directory first on sys.path, and this
    # repository's own folders are named rules/ and connectors/
    py = fresh_venv["python"]
    for dist, tripwire in (("rules", "rules.airfilm"), ("connectors", "connectors.opcua")):
        out = run([py, "-c", f"import {dist}; print({dist}.OWNER); print({dist}.__file__)"], env=_env(),
                  cwd=tmp_path).stdout
        assert out.splitlines() == [f"the foreign {dist} distribution",
                                    str(fresh_venv["purelib"] / dist / "__init__.py")]
        proc = subprocess.run([str(py), "-c", f"import {tripwire}"], capture_output=True, text=True, env=_env(),
                              cwd=tmp_path, timeout=120)
        assert proc.returncode == 1
        assert f"ImportError: {tripwire} of the foreign {dist} distribution" in proc.stderr, proc.stderr


def test_version_and_demo_from_an_empty_folder(fresh_venv, tmp_path):
    empty = tmp_path / "empty"
    empty.mkdir()
    spanwatch = fresh_venv["bin"] / "spanwatch"
    metadata = (next(fresh_venv["purelib"].glob("spanwatch-*.dist-info")) / "METADATA").read_text(encoding="utf-8")
    version = re.search(r"^Version: (.+)$", metadata, re.M).group(1)  # type: ignore[union-attr]
    assert run([spanwatch, "--version"], cwd=empty, env=_env()).stdout == f"spanwatch {version}\n"

    where = Path(run([spanwatch, "examples", "--path", "demo"], cwd=empty, env=_env()).stdout.strip())
    assert where == fresh_venv["purelib"] / "spanwatch" / "examples" / "scenarios" / "demo.toml"

    # the default demo (embedded OPC UA server on loopback, read by the OPC UA client), 50 simulated seconds
    proc = run([spanwatch, "demo", "--duration", "50 s", "--speedup", "5"], cwd=empty, env=_env())
    flat = " ".join(proc.stdout.split())
    assert "Quillmere Works (fictional)" in flat and "scenario demo" in flat
    assert "OPC UA server at opc.tcp://127.0.0.1:" in flat
    # the shipped demo scenario ramps the line speed from 20 s: the air film lifts the web off pull_2
    # (Knox–Sweeney), so its traction alarm is raised and listed in the summary
    assert re.search(r"RAISE traction pull_2 (warning|alarm):", proc.stdout), proc.stdout
    assert "Alarms raised (" in flat and "advisory" in flat
    assert sorted(os.listdir(empty)) == [], "the demo writes only into a temporary folder unless --db is given"


def test_examples_copy_out_of_the_wheel(fresh_venv, tmp_path):
    # a scenario is copied with the line file it names, at the same relative place, so the copy still loads
    spanwatch = fresh_venv["bin"] / "spanwatch"
    run([spanwatch, "examples", "--copy", "cof-drop", "--to", "lines"], cwd=tmp_path, env=_env())
    got = sorted(p.relative_to(tmp_path).as_posix() for p in tmp_path.rglob("*") if p.is_file())
    assert got == ["lines/quillmere-q2.toml", "lines/scenarios/cof-drop.toml"]
    shipped = fresh_venv["purelib"] / "spanwatch" / "examples"
    assert (tmp_path / "lines" / "quillmere-q2.toml").read_bytes() == (shipped / "quillmere-q2.toml").read_bytes()
    out = run([spanwatch, "check-config", "lines/quillmere-q2.toml"], cwd=tmp_path, env=_env()).stdout
    assert "Q2 film rewinder" in out
    # the copies are the user's now: a changed one is not overwritten without --force
    (tmp_path / "lines" / "quillmere-q2.toml").write_text("# edited\n", encoding="utf-8")
    proc = subprocess.run([str(spanwatch), "examples", "--copy", "quillmere-q2.toml", "--to", "lines"],
                          cwd=tmp_path, env=_env(), capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2 and "--force" in proc.stderr
    assert (tmp_path / "lines" / "quillmere-q2.toml").read_text(encoding="utf-8") == "# edited\n"


def test_examples_listing_names_every_shipped_file():
    # in this environment (editable install): the listing covers every file of config/
    result = CliRunner().invoke(app, ["examples"], env={"COLUMNS": "240"})
    assert result.exit_code == 0, result.output
    for p in (REPO / "config").rglob("*"):
        if p.suffix in (".toml", ".service"):
            assert p.relative_to(REPO / "config").as_posix() in result.output
    bad = CliRunner().invoke(app, ["examples", "--path", "no-such-line"])
    assert bad.exit_code == 2
