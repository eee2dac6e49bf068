"""Hostile floats for the no-exception tests: NaN, +-inf, 0, -0, subnormals, huge values."""

from __future__ import annotations

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


def check_pure(table: dict, name: str, args: list) -> None:
    """Call ``table[name] = (func, n_args, property)`` on ``args``: an array of the broadcast shape comes back,
    no exception, and every element satisfies the documented property (when one is given)."""
    func, _, prop = table[name]
    out = func(*args)
    assert isinstance(out, np.ndarray)
    assert out.shape == np.broadcast_shapes(*(np.shape(a) for a in args))
    if prop is not None:
        assert prop(out), f"{name} returned a value outside its documented range: {out}"
