"""Checks on stored figures before anything computes with them: kept light (no pydantic, no numpy), since
the commands that read records import them at start."""

from __future__ import annotations

import math
from typing import Any


def is_number(x: object) -> bool:
    """A finite real number (not a bool): what a stored figure must be before anything computes with it."""
    return isinstance(x, int | float) and not isinstance(x, bool) and math.isfinite(x)


def covariance_problem(cov: Any) -> str | None:
    """Why ``cov`` cannot be the covariance of a cell and an expansion volume, or None: a 2 x 2 matrix of
    finite numbers, variances zero or positive, symmetric, its correlation within +/-1 (a stored correlation
    of 5 gave U = 0, found by a sweep)."""
    if not (isinstance(cov, list | tuple) and len(cov) == 2
            and all(isinstance(r, list | tuple) and len(r) == 2 for r in cov)
            and all(is_number(x) for r in cov for x in r)):
        return "is not a 2 x 2 matrix of numbers"
    (a, b), (c, d) = cov
    if a < 0 or d < 0:
        return "has a negative variance"
    if abs(b - c) > 1e-9 * max(abs(b), abs(c), 1e-300):
        return "is not symmetric"
    if b * b > a * d * (1.0 + 1e-9):
        return "has a correlation beyond +/-1"
    return None
