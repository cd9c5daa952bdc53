"""Plausibility warnings: the vectorised screen agrees with the per-fit warnings."""

from __future__ import annotations

import math

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

from pkcalc.plausibility import implausible, parameter_warnings

logs = st.floats(-8, 10)


@given(st.lists(st.tuples(logs, logs, st.one_of(st.none(), st.floats(0.5, 200))),
                min_size=1, max_size=20))
def test_the_vectorised_screen_flags_exactly_the_fits_that_get_warnings(rows):
    """Limits from the module's documented table (common practice); the screen must
    flag a row exactly when :func:`parameter_warnings` returns a warning."""
    cl = np.array([math.exp(a) for a, _, _ in rows])
    v = np.array([math.exp(b) for _, b, _ in rows])
    w = np.array([np.nan if x is None else x for _, _, x in rows])
    flagged = implausible(cl, v, w)
    for i, (_, _, weight) in enumerate(rows):
        assert bool(flagged[i]) == bool(parameter_warnings(cl[i], v[i], weight))


def test_the_screen_flags_a_unit_slip_and_passes_a_typical_adult():
    """4 L/h and 40 L are adult-like (half-life 6.9 h); 4000 L is a mL-for-L slip."""
    flagged = implausible(np.array([4.0, 4.0, np.nan]), np.array([40.0, 4000.0, 40.0]),
                          np.array([np.nan, 70.0, np.nan]))
    assert flagged.tolist() == [False, True, False]
