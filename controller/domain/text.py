"""Names and notes are plain text: no control characters, on the way in or out.

Why: a sample ID, an operator or an instrument name is printed on terminals, written into CSV files
and reports.  An escape sequence in one recolours or rewrites the screen of whoever lists the runs
(or hides a line of it), a carriage return overwrites what came before it, and neither is ever part
of a name.  Such text is refused where it comes in (command line, daemon API, sequence and instrument
files); what older records hold is shown with the characters escaped.
"""

from __future__ import annotations

import re

_CONTROL = re.compile(r"[\x00-\x1f\x7f-\x9f]")
_CONTROL_IN_NOTE = re.compile(r"[\x00-\x08\x0b-\x1f\x7f-\x9f]")  # a note may run over lines and hold tabs


_SURROGATE = re.compile("[\ud800-\udfff]")  # bytes that were not UTF-8, as the command line passes them


def control_problem(text: str, *, note: bool = False) -> str | None:
    """Why this text is not plain (its first control character and where, or bytes that are not UTF-8),
    or None."""
    bad = _SURROGATE.search(text)
    if bad is not None:  # written to a record, such text failed with a UnicodeEncodeError mid-run
        return f"is not valid UTF-8 text (a byte that is not UTF-8 at character {bad.start() + 1})"
    m = (_CONTROL_IN_NOTE if note else _CONTROL).search(text)
    if m is None:
        return None
    return (f"holds a control character ({ord(m.group()):#04x}) at character {m.start() + 1}; "
            "names, IDs and notes are plain text")


def plain(text: str) -> str:
    """A name, unchanged, if it is plain text (the validator of names in files and requests)."""
    problem = control_problem(text)
    if problem is not None:
        raise ValueError(problem)
    return text


def plain_note(text: str) -> str:
    """A note, unchanged, if it is plain text apart from line breaks and tabs."""
    problem = control_problem(text, note=True)
    if problem is not None:
        raise ValueError(problem)
    return text


def visible(text: str) -> str:
    """The text with each control character but line breaks and tabs shown as its escape (\\x1b), for
    output of older records (a line break is laid out by the table or quoted by the CSV writer)."""
    return _CONTROL_IN_NOTE.sub(lambda m: f"\\x{ord(m.group()):02x}", text)
