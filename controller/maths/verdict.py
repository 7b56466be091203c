"""The verdict on a result no specimen can have, in a module of its own so that `compute`, which keeps
its start light (no typing, dataclasses or numpy), says it in the same words and with the same exit
code as `run` and `analyze`.
"""

from __future__ import annotations

import math

#: The exit code of a verb whose result is NOT A MEASUREMENT (run, analyze, compute)
EXIT_NOT_A_MEASUREMENT = 7

#: How a result no specimen can have (outside_cell) is marked wherever it is shown or stored: the summary's
#: warnings, the catalog row's message, the views; the verbs exit EXIT_NOT_A_MEASUREMENT for it.
NOT_A_MEASUREMENT = "NOT A MEASUREMENT"


def not_a_measurement(why: str) -> str:
    """The line that marks a result as no measurement, with why (outside_cell's sentence)."""
    return f"{NOT_A_MEASUREMENT}: {why}"


def is_not_a_measurement(message: object) -> bool:
    """Whether a stored message (a catalog row's) marks its result as no measurement."""
    return str(message or "").startswith(NOT_A_MEASUREMENT)


def outside_cell(volume: float, expanded_u: float, cell: float) -> str | None:
    """Why a volume cannot be a specimen's (below zero or above the sample cell's volume by more than its
    expanded uncertainty), or None.  Within its U of either end it can: an empty cell measures about
    zero, and a run must not be called impossible for its noise.  Such a result says the chamber volumes
    or the readings are wrong, not something about the specimen."""
    if not (math.isfinite(volume) and math.isfinite(expanded_u)):
        return None
    if volume + expanded_u < 0.0:
        return (f"the volume {volume * 1e6:.5g} cm3 is below zero by more than its U ({expanded_u * 1e6:.3g} cm3): "
                "the chamber volumes (calibration) or the pressure readings are wrong")
    if volume - expanded_u > cell:
        return (f"the volume {volume * 1e6:.5g} cm3 exceeds the sample cell's {cell * 1e6:.5g} cm3 by more than "
                f"its U ({expanded_u * 1e6:.3g} cm3): the chamber volumes (calibration) or the pressure readings "
                "are wrong")
    return None
