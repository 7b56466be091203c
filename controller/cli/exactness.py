"""The note a result carries when its chamber volumes were given without their uncertainties.

Why: `compute` and `analyze --cell-volume/--expansion-volume` take an absent --u-cell-volume or
--u-expansion-volume as zero, and a budget without the volumes' uncertainties printed an expanded U
of +/- 0.00000 cm3 (or one far too small) as if it were the result's.  Kept free of imports: `compute`
loads it on its light start.
"""

from __future__ import annotations

#: what every such note says, whichever volume it names
TAKEN_AS_EXACT = " taken as exact: give --u-"


def exact_volumes(u_vc: float, u_vr: float) -> str | None:
    """What to say next to a result whose Vc and/or Vr have a zero standard uncertainty, or None."""
    if u_vc > 0.0 and u_vr > 0.0:
        return None
    if u_vc <= 0.0 and u_vr <= 0.0:
        return f"chamber volumes{TAKEN_AS_EXACT}cell-volume and --u-expansion-volume"
    if u_vc <= 0.0:
        return f"cell volume Vc{TAKEN_AS_EXACT}cell-volume"
    return f"expansion volume Vr{TAKEN_AS_EXACT}expansion-volume"


def is_exact_volumes(note: str) -> bool:
    """Whether a warning is exact_volumes' note (shown next to the result, not with the others)."""
    return TAKEN_AS_EXACT in note
