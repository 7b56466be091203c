"""How the command line shows figures to people: the display units and tables that never cut a value.

Units are a setting (``--units`` on the verbs that print pressures or densities, default
``$PYCNOCTL_UNITS``, e.g. ``kPa,kg/m3``), not a code change: pressures in bar, kPa or psi, always
gauge (above ambient) in the command line; densities in g/cm3 or kg/m3.  Volumes stay in cm3, the
unit every pycnometry result is quoted in.  The factors are exact by definition (bar, kPa, g/cm3) or
by the definition of the avoirdupois pound and standard gravity (psi); no unit registry is loaded, so
``compute`` and ``runs`` start fast (tests check the factors against pint and scipy.constants).

Tables: a rich table is as wide as the terminal allows, but an ID or a figure is never cut.  Each
column has a priority; when the table would not fit, the least important columns are left out (and
one line says which, and that ``--csv`` has them all) until it fits; what is left keeps its cells whole.
"""

from __future__ import annotations

import argparse
import io
import os
from collections.abc import Sequence

from pycnoctl.controller.cli.main import UsageError
from pycnoctl.controller.domain.text import visible
from pycnoctl.controller.domain.values import FrozenValue, Value

# Start-up time of the command line: csv and json are imported by the functions that use them, and
# typing not at all (typing.TYPE_CHECKING without the import; type checkers take the name as True).
# Units, Column and Fitted are plain classes written out, not dataclasses: importing dataclasses (it
# imports inspect) and building the seven on the `pycnoctl compute` path cost that command 8.5 ms of its
# 27.4 ms start (18.9 ms without; bench/bench_startup.py). Each keeps what it had as a dataclass: the
# same constructor, attributes, == and repr; Units is immutable and hashable, Column and Fitted are not
# hashable.
TYPE_CHECKING = False
if TYPE_CHECKING:
    from typing import Any

# Pa per display unit. psi: 0.45359237 kg x 9.80665 m/s^2 / (0.0254 m)^2 (exact definitions).
PRESSURE_UNITS: dict[str, float] = {"bar": 1e5, "kPa": 1e3, "psi": 0.45359237 * 9.80665 / 0.0254 ** 2}
# kg/m^3 per display unit
DENSITY_UNITS: dict[str, float] = {"g/cm3": 1e3, "kg/m3": 1.0}
_SPELLINGS = {"bar": "bar", "kpa": "kPa", "psi": "psi", "g/cm3": "g/cm3", "g/cm^3": "g/cm3", "g/cc": "g/cm3",
              "kg/m3": "kg/m3", "kg/m^3": "kg/m3"}
# decimals that keep the pressure resolution of a 5-decimal bar figure (0.01 Pa is below any gauge's noise)
_P_DECIMALS = {"bar": 5, "kPa": 3, "psi": 4}
_RHO_DECIMALS = {"g/cm3": 5, "kg/m3": 2}


class Units(FrozenValue):
    """The units figures are shown in (immutable)."""

    _FIELDS = ("pressure", "density")
    pressure: str
    density: str

    def __init__(self, pressure: str = "bar", density: str = "g/cm3") -> None:
        self._freeze(pressure=pressure, density=density)

    def p(self, gauge_pa: float | None) -> str:
        """A gauge pressure (Pa) as a number in the display unit ('-' when there is none)."""
        if gauge_pa is None or gauge_pa != gauge_pa:
            return "-"
        return f"{gauge_pa / PRESSURE_UNITS[self.pressure]:.{_P_DECIMALS[self.pressure]}f}"

    @property
    def p_label(self) -> str:
        """The pressure unit as a column header says it: always gauge."""
        return f"{self.pressure} gauge"

    def rho(self, kg_m3: float | None) -> str:
        if kg_m3 is None or kg_m3 != kg_m3:
            return "-"
        return f"{kg_m3 / DENSITY_UNITS[self.density]:.{_RHO_DECIMALS[self.density]}f}"

    def p_value(self, gauge_pa: float) -> float:
        return gauge_pa / PRESSURE_UNITS[self.pressure]

    def rho_value(self, kg_m3: float) -> float:
        return kg_m3 / DENSITY_UNITS[self.density]


def parse_units(text: str | None) -> Units:
    """'kPa,kg/m3' (either order, either part) -> Units; unknown words are a UsageError naming the choices."""
    pressure, dens = "bar", "g/cm3"
    for word in (text or "").replace(";", ",").replace(" ", ",").split(","):
        if not word:
            continue
        unit = _SPELLINGS.get(word.strip().lower())
        if unit in PRESSURE_UNITS:
            pressure = unit
        elif unit in DENSITY_UNITS:
            dens = unit
        else:
            raise UsageError(f"--units: unknown unit {word!r}; pressures: {', '.join(PRESSURE_UNITS)}; "
                             f"densities: {', '.join(DENSITY_UNITS)}")
    return Units(pressure, dens)


def add_units_arg(p: argparse.ArgumentParser) -> None:
    p.add_argument("--units", metavar="UNITS", default=os.environ.get("PYCNOCTL_UNITS", ""),
                   help="display units, e.g. 'kPa,kg/m3': pressures bar, kPa or psi (always gauge), densities "
                        "g/cm3 or kg/m3 (default $PYCNOCTL_UNITS, else bar and g/cm3)")


def add_output_args(p: argparse.ArgumentParser, *, what: str) -> None:
    """--json and --csv, one spelling on every verb that prints a table."""
    g = p.add_mutually_exclusive_group()
    g.add_argument("--json", action="store_true", help=f"print {what} as JSON instead of tables")
    g.add_argument("--csv", action="store_true", help=f"print {what} as CSV (one header line, SI-free units "
                                                      "named in the headers) instead of tables")


# ----------------------------------------------------------------------------------------- tables
#: The columns a typed name (sample ID, sequence, instrument) asks for at most: a generated sample ID
#: such as 'TILE-2026-0417-B' and a little more fit whole; a 200-character one is folded over lines
NAME_FOLD = 24


class Column(Value):
    """A table column: its header, whether it is numeric (right-aligned) and how much it matters
    (0 = never dropped; higher numbers are dropped first when the terminal is narrow)."""

    _FIELDS = ("header", "numeric", "priority", "wrap", "fold")
    header: str
    numeric: bool
    priority: int
    wrap: bool  # free text that may wrap between words (never an ID or a figure)
    # a name typed by a person (a sample ID, up to 200 characters): it asks for at most this many
    # columns and a longer one is folded over lines, every character kept, so that it cannot crowd
    # the run IDs and figures out of the table
    fold: int | None

    def __init__(self, header: str, numeric: bool = False, priority: int = 0, wrap: bool = False,
                 fold: int | None = None) -> None:
        self.header = header
        self.numeric = numeric
        self.priority = priority
        self.wrap = wrap
        self.fold = fold


class Fitted(Value):
    """A table fitted to a width: the columns kept (their indices) and the headers left out."""

    _FIELDS = ("keep", "dropped", "widths", "fits")
    keep: list[int]
    dropped: list[str]
    widths: dict[int, int]  # the width each kept column is given (its need, or a folded name's less)
    fits: bool  # False: even the essential columns are wider than the terminal

    def __init__(self, keep: list[int], dropped: list[str] | None = None,
                 widths: dict[int, int] | None = None, fits: bool = True) -> None:
        self.keep = keep
        self.dropped = [] if dropped is None else dropped
        self.widths = {} if widths is None else widths
        self.fits = fits


def _cell_width(text: str) -> int:
    from rich.cells import cell_len

    return max((cell_len(line) for line in text.splitlines() or [""]), default=0)


def fit_columns(columns: Sequence[Column], rows: Sequence[Sequence[str]], width: int,
                *, box_overhead: int = 3) -> Fitted:
    """Leave out the least important columns until every kept cell fits whole in ``width``.

    A column needs its widest cell; a header may wrap onto two lines, so it needs only its longest word.
    Each column costs ``box_overhead`` more (padding and its border)."""
    need = [_need(col, [r[i] for r in rows]) for i, col in enumerate(columns)]
    keep = list(range(len(columns)))
    dropped: list[str] = []

    def total() -> int:
        return sum(need[i] + box_overhead for i in keep) + 1

    while total() > width:
        candidates = [i for i in keep if columns[i].priority > 0]
        if not candidates:
            break  # only essential columns left
        worst = max(candidates, key=lambda i: (columns[i].priority, i))
        keep.remove(worst)
        dropped.append(columns[worst].header)
    # still too wide: a folded name gives up columns (down to its header's longest word, and 8) before
    # the IDs and figures would be cut; past that the terminal wraps the line
    for i in keep:
        if columns[i].fold is not None and total() > width:
            floor = max([8, *(_cell_width(w) for w in columns[i].header.split())])
            need[i] = max(min(need[i], floor), need[i] - (total() - width))
    return Fitted(keep, dropped, {i: need[i] for i in keep}, fits=total() <= width)


def _need(col: Column, cells: Sequence[str]) -> int:
    """The narrowest a column can be with no value cut: its widest cell (its longest word for wrapping
    text), and the longest word of its header, which wraps."""
    words = [w for c in cells for w in c.split()] if col.wrap else list(cells)
    widest = max((_cell_width(w) for w in words), default=1)
    if col.fold is not None:
        widest = min(widest, col.fold)
    return max([widest, *(_cell_width(w) for w in col.header.split())])


def console(file: Any = None) -> Any:
    from rich.console import Console

    return Console(file=file, highlight=False)


def print_table(columns: Sequence[Column], rows: Sequence[Sequence[str]], *, title: str | None = None,
                con: Any = None, note_dropped: bool = True) -> list[str]:
    """Print a table that fits the console, cutting no cell; returns the headers left out."""
    from rich import box
    from rich.table import Table

    con = con or console()
    # older records may hold control characters: shown escaped (and measured so), never sent to the terminal
    rows = [[visible(cell) for cell in r] for r in rows]
    fitted = fit_columns(columns, rows, con.width)
    if not fitted.fits:  # a narrow terminal (a phone's, a split pane): no table would keep its figures whole
        print_stacked(columns, rows, title=title, con=con)
        return []
    table = Table(title=title, box=box.SIMPLE_HEAD, title_justify="left")
    for i in fitted.keep:
        col = columns[i]
        # as wide as its widest cell (a folded name's cap), fixed: the header may wrap between words, a
        # value never but a folded name
        width = None if col.wrap else fitted.widths[i]
        table.add_column(col.header, justify="right" if col.numeric else "left", width=width,
                         min_width=fitted.widths[i], overflow="fold")
    for r in rows:
        table.add_row(*(r[i] for i in fitted.keep))
    con.print(table)
    if fitted.dropped and note_dropped:
        con.print(f"(left out to fit {con.width} columns: {', '.join(fitted.dropped)}; a wider terminal, "
                  "--csv or --json shows every column)")
    return fitted.dropped


#: How far a value's own lines are indented under its header in a stacked block: no header starts with a
#: space, so a line that does is always part of the value above it
STACK_INDENT = "  "
_BREAKS = {"\n": "\\n", "\t": "\\t"}


def print_stacked(columns: Sequence[Column], rows: Sequence[Sequence[str]], *, title: str | None = None,
                  con: Any = None) -> None:
    """Each row as a block of 'header: value' lines, for a terminal too narrow for the table's essential
    columns: a figure or an ID is never split (at 40-60 columns the table folded both), a long name folds
    at the terminal's width, every character kept, and no column is left out.

    Only a header starts a line at the left margin. A value that does not fit beside its header goes on
    its own indented line (a date and its time stay together), a longer one folds over indented lines,
    and its line breaks and tabs are shown escaped (\\n, \\t) as the table shows other control
    characters: an old retire reason 'valve swapped' + line break + 'Vc / cm3: 99.99999' must not print a
    line that reads like one of the row's own figures (nor a blank line that reads like a row's end)."""
    from rich.text import Text

    con = con or console()
    if title:
        con.print(title)
    for n, r in enumerate(rows):
        if n:
            con.print()
        for col, cell in zip(columns, r, strict=True):
            if cell.strip():
                for line in stacked_lines(col, cell, con.width):
                    con.print(Text(line), soft_wrap=True)


def stacked_lines(col: Column, cell: str, width: int) -> list[str]:
    """One 'header: value' entry as lines of at most ``width`` cells (past a header that alone is wider)."""
    from rich.cells import cell_len

    value = "".join(_BREAKS.get(ch, ch) for ch in visible(cell))
    first = f"{col.header}: {value}"
    if cell_len(first) <= width:
        return [first]
    room = max(1, width - len(STACK_INDENT))
    return [f"{col.header}:", *(STACK_INDENT + part for part in _fold(value, room, words=col.wrap))]


def _fold(text: str, width: int, *, words: bool) -> list[str]:
    """The text in pieces of at most ``width`` cells: free text between words where it can, anything
    else (an ID, a figure, a name) character by character, no character lost."""
    from rich.cells import cell_len

    if words:
        out: list[str] = []
        line = ""
        for word in text.split(" "):
            joined = f"{line} {word}" if line else word
            if cell_len(joined) <= width:
                line = joined
                continue
            if line:
                out.append(line)
            line = word
            if cell_len(line) > width:  # a word longer than the line is folded like an ID
                *head, line = _fold(line, width, words=False)
                out.extend(head)
        return [*out, line] if line or not out else out
    pieces: list[str] = []
    line = ""
    for ch in text:
        if line and cell_len(line + ch) > width:
            pieces.append(line)
            line = ""
        line += ch
    return [*pieces, line]


def write_csv(rows: Sequence[dict[str, Any]], columns: Sequence[str], out: Any) -> None:
    """Rows as CSV with exactly these columns: floats at full precision (repr), None as empty, lists
    joined with ' | ' (warnings)."""
    import csv

    w = csv.DictWriter(out, fieldnames=list(columns), lineterminator="\n", extrasaction="ignore")
    w.writeheader()
    for r in rows:
        w.writerow({k: _csv_cell(r.get(k)) for k in columns})


def _csv_cell(v: Any) -> Any:
    if v is None:
        return ""
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        return repr(float(v))  # full precision; a numpy float prints as a plain number
    if isinstance(v, (list, tuple)):
        return visible(" | ".join(str(x) for x in v))
    return visible(v) if isinstance(v, str) else v


def csv_text(rows: Sequence[dict[str, Any]], columns: Sequence[str]) -> str:
    buf = io.StringIO()
    write_csv(rows, columns, buf)
    return buf.getvalue()


def dumps(obj: Any) -> str:
    """Strict JSON (NaN and infinities become null), indented for people."""
    import json

    return json.dumps(_clean(obj), indent=2, allow_nan=False, default=str)


def _clean(obj: Any) -> Any:
    if isinstance(obj, float):
        return obj if obj == obj and obj not in (float("inf"), float("-inf")) else None
    if isinstance(obj, dict):
        return {k: _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    return obj
