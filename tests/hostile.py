"""Hostile floats for the no-exception tests: NaN, +-inf, 0, -0, subnormals, huge values.

A pure function of ``spanwatch.rules`` must neither raise nor emit a numpy RuntimeWarning (overflow,
division by zero, 0/0, inf - inf) on any float input: such a warning means a case the function does not
handle on purpose. :func:`no_runtime_warning` records the warnings of the call and asserts there are none,
so the tests check this themselves, whatever the warning filters of the run.
"""

from __future__ import annotations

import contextlib
import warnings
from collections.abc import Iterator

import numpy as np
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

ANY_FLOAT = st.floats(allow_nan=True, allow_infinity=True)
N_FUZZ = 7
SPECIAL = np.array([np.nan, np.inf, -np.inf, 0.0, -0.0, -1.0, 1.0, 0.3, 1e308, -1e308, 5e-324, 1e-300, 1e300])


def any_array(n: int = N_FUZZ):
    """A hypothesis strategy: float64 arrays of any values."""
    return arrays(np.float64, n, elements=ANY_FLOAT)


def special_grid(k: int, rows: int = 4000, seed: int = 0) -> list[np.ndarray]:
    """k columns of rows drawn from SPECIAL: covers most pairs of special values deterministically."""
    rng = np.random.default_rng(seed)
    return [SPECIAL[rng.integers(0, SPECIAL.size, rows)] for _ in range(k)]


def nan_or(out: np.ndarray, ok: np.ndarray) -> bool:
    """Every element is NaN or satisfies ok."""
    return bool(np.all(np.isnan(out) | ok))


@contextlib.contextmanager
def no_runtime_warning() -> Iterator[None]:
    """Fail the test if the block emits a RuntimeWarning (numpy's overflow, divide, invalid value).

    Every warning is recorded (filter "always", so one already seen elsewhere is not hidden by the
    once-per-location registry) and the RuntimeWarnings among them are listed in the failure.
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        yield
    runtime = [f"{w.category.__name__} at {w.filename}:{w.lineno}: {w.message}"
               for w in caught if issubclass(w.category, RuntimeWarning)]
    assert not runtime, "RuntimeWarning on hostile input: " + "; ".join(runtime)


def check_pure(table: dict, name: str, args: list) -> None:
    """Call ``table[name] = (func, n_args, property)`` on ``args``: an array of the broadcast shape comes back,
    no exception, no RuntimeWarning, and every element satisfies the documented property (when one is given)."""
    func, _, prop = table[name]
    with no_runtime_warning():
        out = func(*args)
    assert isinstance(out, np.ndarray)
    assert out.shape == np.broadcast_shapes(*(np.shape(a) for a in args))
    if prop is not None:
        assert prop(out), f"{name} returned a value outside its documented range: {out}"
