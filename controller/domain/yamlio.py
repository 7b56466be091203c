"""Safe YAML loading that remembers where every value came from.

Sequence, instrument and simulator files are edited by hand, so a mistake must be reported as
``file:line:col: message`` before anything touches hardware, and all mistakes at once.  Loading
is deliberately strict: no tags, no anchors or aliases (no alias bombs), no duplicate keys,
UTF-8 only, a size cap, a nesting cap (PyYAML composes recursively: a few hundred brackets would
otherwise end in RecursionError), and regular files only (a directory or a FIFO is refused).
"""

from __future__ import annotations

import re
import stat
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

import yaml
from pydantic import BaseModel, ValidationError

MAX_BYTES = 256 * 1024
MAX_DEPTH = 64  # nesting levels; the deepest real file (an instrument config) uses about 5

Loc = tuple[str | int, ...]
M = TypeVar("M", bound=BaseModel)

_PLAIN_TAGS = {
    "tag:yaml.org,2002:str",
    "tag:yaml.org,2002:int",
    "tag:yaml.org,2002:float",
    "tag:yaml.org,2002:bool",
    "tag:yaml.org,2002:null",
    "tag:yaml.org,2002:map",
    "tag:yaml.org,2002:seq",
}


@dataclass(frozen=True)
class Problem:
    """One mistake in an input file, with its position (1-based line and column)."""

    file: str
    line: int
    col: int
    message: str

    def __str__(self) -> str:
        return f"{self.file}:{self.line}:{self.col}: {self.message}"


class ConfigError(Exception):
    """Every problem found in one input file."""

    def __init__(self, problems: Iterable[Problem]) -> None:
        self.problems = list(problems)
        super().__init__("\n".join(str(p) for p in self.problems))


@dataclass
class Document:
    """Plain data from a YAML file plus the position of every key and value."""

    name: str
    data: Any
    marks: dict[Loc, tuple[int, int]] = field(default_factory=dict)

    def where(self, loc: Loc) -> tuple[int, int]:
        """Position of loc, or of its nearest ancestor that has one."""
        loc = tuple(loc)
        while loc:
            if loc in self.marks:
                return self.marks[loc]
            loc = loc[:-1]
        return self.marks.get((), (1, 1))

    def problem(self, loc: Loc, message: str) -> Problem:
        line, col = self.where(loc)
        return Problem(self.name, line, col, message)


class _StrictLoader(yaml.SafeLoader):
    """A SafeLoader that refuses anchors, aliases and deep nesting as soon as it meets them."""

    _depth = 0

    def compose_node(self, parent: yaml.Node | None, index: int) -> yaml.Node | None:
        if self.check_event(yaml.AliasEvent):
            event = self.peek_event()  # type: ignore[no-untyped-call]  # untyped in the PyYAML stubs
            raise yaml.MarkedYAMLError(None, None, "aliases are not allowed", event.start_mark)
        event = self.peek_event()  # type: ignore[no-untyped-call]
        anchor = getattr(event, "anchor", None)
        if anchor is not None:
            raise yaml.MarkedYAMLError(None, None, "anchors are not allowed", event.start_mark)
        if self._depth >= MAX_DEPTH:
            raise yaml.MarkedYAMLError(None, None, f"nested deeper than {MAX_DEPTH} levels", event.start_mark)
        self._depth += 1
        try:
            return super().compose_node(parent, index)
        finally:
            self._depth -= 1


def _pos(mark: yaml.Mark) -> tuple[int, int]:
    return mark.line + 1, mark.column + 1


#: What PyYAML counts as a line break when it marks positions (YAML 1.1 line-break characters).
_YAML_BREAK = re.compile("\r\n|[\n\r\x85\u2028\u2029]")


def _reader_pos(text: str, exc: BaseException) -> tuple[int, int]:
    """Position of a reader error (it carries a character offset, not a mark), counted as PyYAML counts."""
    offset = getattr(exc, "position", None)
    if not isinstance(offset, int):
        return 1, 1
    i = min(max(offset, 0), len(text))
    breaks = list(_YAML_BREAK.finditer(text, 0, i))
    return len(breaks) + 1, i - (breaks[-1].end() if breaks else 0) + 1


def _reader_message(exc: BaseException) -> str:
    if isinstance(exc, yaml.reader.ReaderError):
        ch = exc.character if isinstance(exc.character, int) else ord(str(exc.character)[:1] or "\0")
        return f"character U+{ch:04X} is not allowed in YAML"
    return str(exc).splitlines()[0] if str(exc) else type(exc).__name__


def _build(node: yaml.Node, loc: Loc, doc: Document, problems: list[Problem], loader: _StrictLoader) -> Any:
    doc.marks[loc] = _pos(node.start_mark)
    if node.tag not in _PLAIN_TAGS:
        line, col = _pos(node.start_mark)
        problems.append(Problem(doc.name, line, col, f"tag {node.tag!r} is not allowed"))
        return None
    if isinstance(node, yaml.MappingNode):
        out: dict[Any, Any] = {}
        for key_node, value_node in node.value:
            if not isinstance(key_node, yaml.ScalarNode) or key_node.tag not in _PLAIN_TAGS:
                line, col = _pos(key_node.start_mark)
                what = "keys must be plain scalars" if not isinstance(key_node, yaml.ScalarNode) \
                    else f"tag {key_node.tag!r} is not allowed"
                problems.append(Problem(doc.name, line, col, what))
                continue
            key = loader.construct_object(key_node)
            if key in out:
                line, col = _pos(key_node.start_mark)
                problems.append(Problem(doc.name, line, col, f"duplicate key {key!r}"))
                continue
            doc.marks[(*loc, key)] = _pos(key_node.start_mark)
            out[key] = _build(value_node, (*loc, key), doc, problems, loader)
            doc.marks[(*loc, key)] = _pos(key_node.start_mark)
        return out
    if isinstance(node, yaml.SequenceNode):
        return [_build(item, (*loc, i), doc, problems, loader) for i, item in enumerate(node.value)]
    return loader.construct_object(node)


def parse_text(text: str, name: str = "<string>", *, collect: list[Problem] | None = None) -> Document:
    """Parse YAML text strictly; raises ConfigError listing every problem found.

    ``collect``: problems that leave a tree behind (a duplicate key, a tag) go into this list and the
    document is returned without them (the first of duplicate keys kept), so that the caller can
    report them together with the schema's; a file that cannot be parsed at all still raises."""
    try:
        loader = _StrictLoader(text)
    except yaml.YAMLError as exc:  # e.g. a NUL or other non-printable character, found by the reader
        mark = getattr(exc, "problem_mark", None)
        line, col = _pos(mark) if mark else _reader_pos(text, exc)
        raise ConfigError([Problem(name, line, col, _reader_message(exc))]) from None
    try:
        try:
            root = loader.get_single_node()
        except yaml.MarkedYAMLError as exc:
            mark = exc.problem_mark or exc.context_mark
            line, col = _pos(mark) if mark else (1, 1)
            raise ConfigError([Problem(name, line, col, exc.problem or str(exc))]) from None
        except yaml.YAMLError as exc:
            line, col = _reader_pos(text, exc)
            raise ConfigError([Problem(name, line, col, _reader_message(exc))]) from None
        except RecursionError:  # a backstop: the nesting cap should stop it first
            raise ConfigError([Problem(name, 1, 1, "nested too deeply to read")]) from None
        doc = Document(name, None)
        if root is None:
            raise ConfigError([Problem(name, 1, 1, "the file is empty")])
        problems: list[Problem] = []
        doc.data = _build(root, (), doc, problems, loader)
    finally:
        loader.dispose()
    if problems and collect is None:
        raise ConfigError(problems)
    if collect is not None:
        collect.extend(problems)
    return doc


def load_file(path: str | Path, max_bytes: int = MAX_BYTES, *, collect: list[Problem] | None = None) -> Document:
    """Read and parse a YAML file, refusing oversize or non-UTF-8 input (``collect``: as parse_text)."""
    p = Path(path)
    name = str(path)
    try:
        st = p.stat()
        if not stat.S_ISREG(st.st_mode):
            kind = "a directory" if stat.S_ISDIR(st.st_mode) else "a device, pipe or socket"
            raise ConfigError([Problem(name, 1, 1, f"cannot read: {kind}, not a file")])
        if st.st_size > max_bytes:
            raise ConfigError([Problem(name, 1, 1, f"file is {st.st_size} bytes; the limit is {max_bytes}")])
        with p.open("rb") as fh:
            raw = fh.read(max_bytes + 1)
    except OSError as exc:
        raise ConfigError([Problem(name, 1, 1, f"cannot read: {exc.strerror or exc}")]) from None
    if len(raw) > max_bytes:  # grew since stat
        raise ConfigError([Problem(name, 1, 1, f"file is over the limit of {max_bytes} bytes")])
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        col = exc.start - (raw.rfind(b"\n", 0, exc.start) + 1) + 1
        raise ConfigError([Problem(name, line, col, "not valid UTF-8")]) from None
    return parse_text(text, name, collect=collect)


def _message(err: dict[str, Any]) -> str:
    loc = ".".join(str(x) for x in err["loc"])
    msg = err["msg"].removeprefix("Value error, ")  # pydantic's tag on a validator's own sentence
    if err["type"] == "extra_forbidden" and err["loc"]:
        return f"unknown key {err['loc'][-1]!r}"
    if err["type"] == "missing":
        return f"missing key {err['loc'][-1]!r}" if err["loc"] else "missing value"
    return f"{loc}: {msg}" if loc else msg


def _strip_loc(loc: tuple[Any, ...], doc: Document) -> Loc:
    """Drop pydantic's validator and union tags (never keys of the document) so loc is the YAML path."""
    out: list[Any] = []
    for x in loc:
        if isinstance(x, str) and "[" in x and (*out, x) not in doc.marks:
            continue
        out.append(x)
    return tuple(out)


#: Validation context key set for every document: the values come from a file, where a model may ask
#: for more than from code (controller.domain.gaspath.Limits refuses unit-less pressures there).
DOCUMENT = "document"


def validate(model: type[M], doc: Document, context: dict[str, Any] | None = None) -> M:
    """Validate doc against a pydantic model; problems come back with their file positions."""
    context = {DOCUMENT: True, **(context or {})}
    try:
        return model.model_validate(doc.data, context=context)
    except ValidationError as exc:
        problems = []
        for err in exc.errors():
            loc = _strip_loc(tuple(err["loc"]), doc)
            problems.append(doc.problem(loc, _message({**err, "loc": loc})))
        raise ConfigError(problems) from None


def load_model(model: type[M], path: str | Path, context: dict[str, Any] | None = None) -> M:
    """Load a YAML file into a validated model, or raise ConfigError with every position."""
    return validate(model, load_file(path), context)
