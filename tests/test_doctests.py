"""Run the examples in every docstring of the installed package (``spanwatch.*``).

The doctests document the physics with worked values; importing through the package
name (not the folders) checks them as a user's import sees them.
"""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest


def _modules() -> list[str]:
    out = []
    for pkg_name in ("spanwatch.rules", "spanwatch.connectors", "spanwatch.monitor"):
        pkg = importlib.import_module(pkg_name)
        out.append(pkg_name)
        out += [m.name for m in pkgutil.walk_packages(pkg.__path__, prefix=f"{pkg_name}.")
                if not m.name.endswith("__main__")]
    return sorted(out)


MODULES = _modules()


def test_every_package_is_walked():
    # The walk must reach the physics, the adapters and the application, or the doctests below prove nothing.
    assert {"spanwatch.rules.traction", "spanwatch.rules.drift.design", "spanwatch.connectors.recording",
            "spanwatch.monitor.cli"} <= set(MODULES)


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    module = importlib.import_module(name)
    finder = doctest.DocTestFinder()
    runner = doctest.DocTestRunner(optionflags=doctest.NORMALIZE_WHITESPACE | doctest.ELLIPSIS)
    for test in finder.find(module, name):
        runner.run(test)
    result = runner.summarize(verbose=False)
    assert result.failed == 0, f"{result.failed} of {result.attempted} docstring examples failed in {name}"
