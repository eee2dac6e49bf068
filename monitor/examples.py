"""The example line files and scenarios that ship with spanwatch, found where they are installed.

They live in the folder ``config/`` of the repository and are installed as the data package
``spanwatch.examples`` (``config/scenarios/`` beneath it), so an installed wheel finds them
through :func:`importlib.resources.files`, never through a path relative to the source tree.
Names are relative to that package and use ``/``: ``"quillmere-q2.toml"``,
``"scenarios/demo.toml"``. The files refer to each other by relative paths
(``extends = "quillmere-q2.toml"``, a scenario's ``config = "../quillmere-q2.toml"``), so
:func:`example_path` hands out real file paths inside one folder, and :func:`copy_example`
copies a file together with the files it refers to, keeping their relative places.

Only the standard library is imported here, so listing the examples costs no start-up time.

>>> example_path("scenarios/demo.toml").name
'demo.toml'
>>> example_path("demo") == example_path("scenarios/demo.toml")
True
>>> "quillmere-q2.toml" in [e.name for e in list_examples()]
True
>>> example_files("scenarios/demo.toml")
['quillmere-q2.toml', 'scenarios/demo.toml']
"""

from __future__ import annotations

import atexit
import re
import shutil
import tempfile
import textwrap
import tomllib
from dataclasses import dataclass
from functools import lru_cache
from importlib.resources import files
from importlib.resources.abc import Traversable
from pathlib import Path, PurePosixPath

PACKAGE = "spanwatch.examples"
SUFFIXES = (".toml", ".service")
_SENTENCE_END = re.compile(r"\.\s+(?=[A-Z])")


class ExampleError(LookupError):
    """A name that is no shipped example; the message lists the names there are."""


@dataclass(frozen=True)
class Example:
    """One shipped example: its name, what kind of file it is, a one-line description and where it is."""

    name: str  # relative to the package, with "/": "quillmere-q2.toml", "scenarios/demo.toml"
    kind: str  # "line", "scenario" or "service" (a systemd unit)
    description: str
    refers_to: tuple[str, ...]  # other examples it needs next to it (extends, a scenario's config)
    path: Path


@lru_cache(maxsize=1)
def examples_root() -> Path:
    """The folder holding the installed examples (a copy in a temporary folder if they are inside a zip)."""
    root = files(PACKAGE)
    if isinstance(root, Path):
        return root
    out = Path(tempfile.mkdtemp(prefix="spanwatch-examples-"))
    atexit.register(shutil.rmtree, out, True)
    _extract(root, out)
    return out


def _extract(node: Traversable, dest: Path) -> None:
    for child in node.iterdir():
        if child.is_dir():
            if child.name != "__pycache__":
                (dest / child.name).mkdir()
                _extract(child, dest / child.name)
        elif child.name.endswith(SUFFIXES):
            (dest / child.name).write_bytes(child.read_bytes())


def _names() -> list[str]:
    root = examples_root()
    found = [p.relative_to(root).as_posix() for p in root.rglob("*") if p.is_file() and p.name.endswith(SUFFIXES)]
    return sorted(found, key=lambda n: (n.count("/"), n))


def resolve_name(name: str) -> str:
    """The full example name for ``name``: exact, or without ``.toml`` / without ``scenarios/`` if unique."""
    names = _names()
    wanted = name.strip().replace("\\", "/").removeprefix("./")
    if wanted in names:
        return wanted
    candidates = [n for n in names if wanted in (PurePosixPath(n).name, PurePosixPath(n).stem,
                                                  n.removesuffix(".toml"))]
    if len(candidates) == 1:
        return candidates[0]
    if candidates:
        raise ExampleError(f"{name!r} names more than one example: {', '.join(candidates)}")
    raise ExampleError(f"no example named {name!r}; the examples are: {', '.join(names)}")


def example_path(name: str) -> Path:
    """The installed file of the example ``name`` (e.g. ``"quillmere-q2.toml"``, ``"scenarios/demo.toml"``).

    A file path on disk, so ``extends`` and a scenario's ``config`` resolve beside it. Raises
    :class:`ExampleError` for a name that is no example.
    """
    return examples_root() / resolve_name(name)


def _refers_to(name: str, path: Path) -> tuple[str, ...]:
    """The examples ``name`` refers to by a relative path (``extends``, ``[scenario] config``), if any."""
    if not name.endswith(".toml"):
        return ()
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (OSError, tomllib.TOMLDecodeError):
        return ()
    refs = [data.get("extends"), (data.get("scenario") or {}).get("config")]
    root = examples_root().resolve()
    out = []
    for ref in refs:
        if not isinstance(ref, str) or Path(ref).is_absolute():
            continue
        target = (path.parent / ref).resolve()
        if target.is_relative_to(root) and target.is_file():
            out.append(target.relative_to(root).as_posix())
    return tuple(out)


def _description(name: str, path: Path) -> str:
    """The first sentence of the file's opening comment; for a file without one, what its tables say."""
    text = path.read_text(encoding="utf-8")
    comment: list[str] = []
    for raw in text.splitlines():
        if not raw.startswith("#"):
            break
        comment.append(raw.lstrip("#").strip())
    first = _SENTENCE_END.split(" ".join(comment), maxsplit=1)[0].rstrip(".") if comment else ""
    data: dict[str, object] = {}
    if name.endswith(".toml"):
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError:
            return first or "(not valid TOML)"
    line, sc = data.get("line"), data.get("scenario")
    if len(first) < 40 and isinstance(line, dict):  # a short heading: say which line it is
        first = f"{first}: " * bool(first) + f"line {line.get('name', '?')}, {line.get('plant', '?')}"
    elif not first and isinstance(sc, dict):
        n = len(data.get("fault") or [])  # type: ignore[arg-type]
        first = (f"scenario {sc.get('name', PurePosixPath(name).stem)}: {sc.get('duration', '?')} of "
                 f"{PurePosixPath(str(sc.get('config', '?'))).name}, " + (f"{n} fault(s)" if n else "no fault"))
    return textwrap.shorten(first, width=160, placeholder=" ...")


def _kind(name: str, path: Path) -> str:
    """``service``, ``scenario`` (a file with a ``[scenario]`` table) or ``line``."""
    if name.endswith(".service"):
        return "service"
    if not name.startswith("scenarios/"):
        return "line"
    try:
        text = path.read_text(encoding="utf-8")
    except OSError:
        return "scenario"
    return "scenario" if re.search(r"^\[scenario\]", text, re.M) else "line"


def list_examples() -> list[Example]:
    """Every shipped example (line files first, then scenarios), with its one-line description."""
    root = examples_root()
    return [Example(n, _kind(n, root / n), _description(n, root / n), _refers_to(n, root / n), root / n)
            for n in _names()]


def example_files(name: str) -> list[str]:
    """``name`` and every example it refers to, directly or through another, bases first."""
    root = examples_root()
    order: list[str] = []

    def visit(n: str, depth: int) -> None:
        if n in order or depth > 8:
            return
        for ref in _refers_to(n, root / n):
            visit(ref, depth + 1)
        order.append(n)

    visit(resolve_name(name), 0)
    return order


def copy_example(name: str, dest: str | Path, *, overwrite: bool = False) -> list[tuple[Path, str]]:
    """Copy the example ``name`` and the examples it refers to into the folder ``dest``.

    Relative places are kept (``scenarios/demo.toml`` goes to ``dest/scenarios/demo.toml`` and its
    line file to ``dest/quillmere-q2.toml``), so the copies still find each other. A file already
    there with the same content is left as it is; one with other content raises
    :class:`FileExistsError` unless ``overwrite``. Returns ``(path, "copied" | "unchanged" |
    "replaced")`` for each file.
    """
    dest = Path(dest)
    root = examples_root()
    plan = [(root / n, dest / n) for n in example_files(name)]
    if not overwrite:
        clash = [str(t) for s, t in plan if t.exists() and (not t.is_file() or t.read_bytes() != s.read_bytes())]
        if clash:
            raise FileExistsError(f"would overwrite {', '.join(clash)} (different content)")
    done: list[tuple[Path, str]] = []
    for src, target in plan:
        if target.is_file() and target.read_bytes() == src.read_bytes():
            done.append((target, "unchanged"))
            continue
        status = "replaced" if target.exists() else "copied"
        target.parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(src, target)
        done.append((target, status))
    return done
