"""Does a stored result agree with itself and with the catalog?  A record edited by hand must not be shown
as fact.

A run's result is written twice, in one process at its end: summary.json (the volume, its U, the cycles it
is the mean of) and the catalog row (the volume, its U, the density).  The volume is the mean of the kept
cycles' volumes (maths.uncertainty.combine_run), and U is k times the standard uncertainty both keep.  So
any disagreement between these says one was changed after the run (found by a sweep: a summary edited to
5.5 +/- 0 cm3 was shown as the result while its own cycles and the catalog said 4.99979 +/- 0.00228).
"""

from __future__ import annotations

from pathlib import Path
from statistics import fmean
from typing import Any

from pycnoctl.controller.domain.figures import is_number
from pycnoctl.controller.record.runfolder import catalog_beside

#: relative difference beyond which two copies of one stored number disagree (they are written from one
#: float, so only JSON's round trip separates them: 1e-12 would do; 1e-9 leaves room for any reader)
TOLERANCE = 1e-9


def _num(x: Any) -> float | None:
    return float(x) if is_number(x) else None


def _differ(a: float | None, b: float | None) -> bool:
    if a is None or b is None:
        return (a is None) != (b is None)
    return abs(a - b) > TOLERANCE * max(abs(a), abs(b), 1e-300)


def disagreements(results: dict[str, Any], row: Any | None = None) -> list[str]:
    """What in a summary's results (and the run's catalog ``row``, when given) contradicts the rest."""
    out: list[str] = []
    volume, u_std, u_exp, k = (_num(results.get(key)) for key in ("volume_cm3", "volume_u_std_cm3",
                                                                  "volume_u_cm3", "k"))
    kept = [_num(c.get("volume_cm3")) for c in results.get("cycles") or [] if isinstance(c, dict) and c.get("kept")]
    if kept and all(v is not None for v in kept):
        mean = fmean(v for v in kept if v is not None)
        if _differ(volume, mean):
            out.append(f"the stored volume ({volume}) is not the mean of its kept cycles ({mean:.9g} cm3)")
    if u_std is not None and u_exp is not None and k is not None and _differ(u_exp, k * u_std):
        out.append(f"the stored U ({u_exp} cm3) is not k = {k:g} times its standard uncertainty ({u_std:.6g} cm3)")
    if row is not None:
        cat_v = row.volume_m3 * 1e6 if row.volume_m3 is not None else None
        cat_u = row.u_volume_m3 * 1e6 if row.u_volume_m3 is not None else None
        if _differ(volume, cat_v):
            out.append(f"the catalog keeps another volume for this run ({cat_v} cm3)")
        if _differ(u_exp, cat_u):
            out.append(f"the catalog keeps another U for this run ({cat_u} cm3)")
    return out


def disagreement_line(found: list[str]) -> str | None:
    """The one line every view prints above a result whose record disagrees with itself."""
    if not found:
        return None
    return ("RECORD DISAGREES: " + "; ".join(found) + ". summary.json or the catalog was changed after the run: "
            "re-analyse the trace (pycnoctl analyze) rather than trust either")


def folder_disagreements(folder: Path, doc: dict[str, Any]) -> list[str]:
    """disagreements() of a run folder's summary, with the catalog beside it where there is one."""
    results = doc.get("results") if isinstance(doc.get("results"), dict) else {}
    row = None
    catalog_path = catalog_beside(folder)
    if catalog_path is not None:
        from pycnoctl.controller.record.catalog import Catalog

        with Catalog.for_reading(catalog_path) as catalog:
            row = catalog.get_run(folder.name)
    return disagreements(results, row)
