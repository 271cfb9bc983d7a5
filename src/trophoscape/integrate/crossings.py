"""Where populations fall through a level within one solver step, on its interpolant.

Shared by the whole-network solver loop (:mod:`trophoscape.integrate.ode`) and the regional
retaking of steps with removals (:mod:`trophoscape.integrate.retake`). Every function takes
``at(index, x)``: components ``index`` of the step's interpolant, each at its own positions
``x`` in the step (0 at its start, 1 at its end; shape ``(len(index),)`` or
``(points, len(index))``).
"""

from __future__ import annotations

import numpy as np
import scipy.integrate as si

__all__ = ["Rows", "dense_at", "horner", "falls_through_within", "crossing_positions",
           "interpolant_arrays"]

#: Populations within this share of the threshold at either end of a step are looked at
#: between its ends (a dip, or a rise, larger than this within one error-controlled step is
#: implausible).
NEAR = 0.25
#: Points per step at which populations near the threshold are looked at between step ends.
LOOKS = 16
#: Points per round, and rounds, that narrow a crossing: 64**7 = 2**42 of the step.
REFINE, ROUNDS = 64, 7


def dense_at(dense, index, x):
    """Components ``index`` of one step's dense output, each at its own points ``x``.

    ``x`` (shape ``(len(index),)``, or ``(m, len(index))`` for ``m`` points per component)
    is the position in the step, 0 at its start and 1 at its end. scipy's Runge–Kutta
    interpolants are polynomials with per-component coefficients, evaluated here for those
    rows only, at every point in one array operation; None for other interpolants.
    """
    x = np.asarray(x, dtype=float)
    if isinstance(dense, si._ivp.rk.RkDenseOutput):
        return dense.h * horner(dense.Q[index], x) + dense.y_old[index]
    if isinstance(dense, si._ivp.rk.Dop853DenseOutput):
        y = np.zeros(x.shape)
        for i, f in enumerate(reversed(dense.F)):
            y += f[index]
            y *= x if i % 2 == 0 else 1.0 - x
        return y + dense.y_old[index]
    return None


def horner(q, x):
    """``sum_j q[:, j] x**(j + 1)`` (scipy's Runge–Kutta interpolants without ``h`` and
    ``y_old``) by Horner's rule; ``q`` is ``(components, terms)``, ``x`` one position per
    component (``(components,)``) or several (``(points, components)``)."""
    acc = q[:, -1] * x
    for j in range(q.shape[1] - 2, -1, -1):
        acc += q[:, j]
        acc *= x
    return acc


class Rows:
    """Components ``index`` of one step's dense output, for evaluating many times.

    Like :func:`dense_at` with one position per component (``x``, shape ``(len(index),)``),
    with the interpolant's coefficients of those rows gathered once, and the polynomial
    evaluated by Horner's rule.
    """

    def __init__(self, dense, index=None):
        if dense is None:  # filled by take()
            return
        self.y_old = dense.y_old[index]
        if isinstance(dense, si._ivp.rk.RkDenseOutput):
            self.h = dense.h
            self.coefficients = np.ascontiguousarray(dense.Q[index])
            self.factors = None
        elif isinstance(dense, si._ivp.rk.Dop853DenseOutput):
            self.factors = [f[index] for f in reversed(dense.F)]
        else:
            raise TypeError("a Runge-Kutta dense output is needed")

    def take(self, index) -> "Rows":
        """These rows' ``index``-th ones, as another :class:`Rows`."""
        new = Rows(None)
        new.y_old = self.y_old[index]
        new.factors = None if self.factors is None else [f[index] for f in self.factors]
        if self.factors is None:
            new.h = self.h
            new.coefficients = self.coefficients[index]
        return new

    def __call__(self, x):
        if self.factors is None:
            return self.h * horner(self.coefficients, x) + self.y_old
        y = np.zeros_like(x)
        for i, f in enumerate(self.factors):
            y += f
            y *= x if i % 2 == 0 else 1.0 - x
        return y + self.y_old


def interpolant_arrays(dense):
    """A whole step's interpolant over the network as the compiled code reads it:
    ``(kind, y_old, coefficients, h)`` (:func:`trophoscape.integrate.compiled._interpolant`:
    kind 0 scipy's Runge–Kutta form, 1 DOP853's, its factors stacked in :class:`Rows`'
    order)."""
    rows = Rows(dense, slice(None))
    if rows.factors is None:
        return 0, rows.y_old, rows.coefficients, float(rows.h)
    return 1, rows.y_old, np.ascontiguousarray(np.stack(rows.factors, axis=1)), 0.0


def _falls_within(values, level, armed):
    """For each column of ``values`` (a population on the step's grid, its start first):
    the first grid point below ``level`` after the population was at or above it, at the
    start (``armed``) or at an earlier point; ``-1`` where there is none."""
    at_or_above = values >= level
    at_or_above[0] |= armed
    seen = np.maximum.accumulate(at_or_above, axis=0)
    falls = (values[1:] < level) & seen[:-1]
    return np.where(falls.any(axis=0), np.argmax(falls, axis=0) + 1, -1)


def _grid_values(at, index):
    grid = np.linspace(0.0, 1.0, LOOKS + 1)
    return grid, at(index, np.repeat(grid[:, None], index.size, axis=1))


def falls_through_within(at, index, level, armed):
    """Which of ``index`` fall through ``level`` somewhere in the step, on its interpolant.

    Looked at on ``LOOKS + 1`` evenly spaced points: a population that dips through the
    threshold and back within one step is removed like one that ends the step below it, and
    one below the threshold at both ends of a step that rose to it in between (and so
    counted as present) and fell back is removed too, so the rule does not depend on where
    the solver happened to put its step ends. ``armed``: at or above the threshold at the
    step's start.
    """
    _, values = _grid_values(at, index)
    return _falls_within(values, level, armed) >= 0


def crossing_positions(at, index, level, armed):
    """Where in the step each of ``index`` first falls through ``level`` (after being at or
    above it: at the step's start, ``armed``, or later in the step), and its abundance
    there.

    The first of ``LOOKS + 1`` evenly spaced points below the threshold after one at or
    above it brackets the crossing with the point before it; each round then looks at
    ``REFINE - 1`` evenly spaced points within the bracket and keeps the first below the
    threshold with the point before it, until the bracket is 2**-42 of the step.
    """
    grid, values = _grid_values(at, index)
    first = _falls_within(values, level, armed)
    first = np.where(first >= 0, first, LOOKS)
    lo = grid[np.maximum(first - 1, 0)]
    hi = grid[first]
    inner = np.arange(1, REFINE)[:, None] / REFINE
    cols = np.arange(index.size)
    for _ in range(ROUNDS):
        points = lo + inner * (hi - lo)  # (REFINE - 1, components)
        below = at(index, points) < level
        j = np.where(below.any(axis=0), np.argmax(below, axis=0), REFINE - 1)
        new_hi = np.where(j < REFINE - 1, points[np.minimum(j, REFINE - 2), cols], hi)
        lo = np.where(j > 0, points[np.maximum(j - 1, 0), cols], lo)
        hi = new_hi
    return hi, at(index, hi)
