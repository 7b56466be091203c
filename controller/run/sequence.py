"""Sequence files (format ``pycnoctl-sequence/1``): the model, its validation and the shipped files.

Why: a sequence is edited by hand and then drives valves and pressures, so nothing may reach the
instrument until the whole file is proven sound, and every mistake must be reported at once as
``file:line:col: message``.  The YAML is read strictly by :mod:`pycnoctl.controller.domain.yamlio`;
values with units become SI floats through :mod:`pycnoctl.controller.domain.units` (pressures are gauge).

Validation happens in three layers:

1. field types and ranges (pydantic, ``extra='forbid'``), each error at its key;
2. cross-field rules (``discard < count``, ``min_time <= max_time``, kind-specific sections...),
   computed by small rule functions so that each problem points at the exact key it is about,
   and so that they are reported together with the field errors of *other* sections;
3. :func:`check_against_instrument`, the rules that need the instrument config (names of the
   expansion volumes, the overpressure limit, the gas).

``load_sequence`` runs 1 and 2 and returns a frozen :class:`Sequence` that remembers its file
(``seq.path``), the exact text read (``seq.raw_text``, recorded by the engine in the run summary)
and the positioned document (``seq.doc``, used by :func:`check_against_instrument`).
"""

from __future__ import annotations

import difflib
import importlib.resources
import math
import typing
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    PrivateAttr,
    StrictBool,
    StrictInt,
    StrictStr,
    TypeAdapter,
    ValidationError,
    ValidationInfo,
    field_validator,
    model_validator,
)
from pydantic_core import PydanticCustomError

from pycnoctl.controller.domain import units
from pycnoctl.controller.domain.gas import GASES, UnknownGas, get_gas
from pycnoctl.controller.domain.gaspath import vented_band_problem
from pycnoctl.controller.domain.text import plain
from pycnoctl.controller.domain.yamlio import MAX_BYTES, ConfigError, Document, Loc, Problem, load_file, parse_text

FORMAT = "pycnoctl-sequence/1"


#: Kinds whose cycles fill the cell and expand into an expansion volume.
EXPANDING_KINDS = ("measure", "calibrate")

#: Default share of max_pressure kept free between a setpoint (plus overshoot) and the trip limit.
DEFAULT_MARGIN = 0.10

# Context key: defer cross-field rules to load_sequence, which positions each one at its key.
_DEFER = "defer_rules"


# --------------------------------------------------------------------------- unit-carrying types


def _err(kind: str, text: str) -> PydanticCustomError:
    """A pydantic error whose message is exactly ``text`` (no template formatting of user input)."""
    return PydanticCustomError(kind, "{m}", {"m": text})


def _adapter(parse: Callable[[Any], float]) -> Callable[[Any], float]:
    """Wrap a units parser so a bad value becomes one clean pydantic error with the parser's words."""

    def convert(value: Any) -> float:
        if isinstance(value, bool) or value is None or isinstance(value, dict | list):
            got = "nothing" if value is None else type(value).__name__
            raise _err("unit", f"expected a number or a 'number unit' text, got {got}")
        try:
            out = parse(value)
        except units.UnitError as exc:
            raise _err("unit", str(exc)) from None
        except Exception:  # pint's unit parser can raise odd errors on odd text; it is user input
            raise _err("unit", f"cannot read {str(value)[:60]!r} as a number with a unit") from None
        if not math.isfinite(out):
            raise PydanticCustomError("unit", "value is not a finite number", {})
        return out

    return convert


Pressure = Annotated[float, BeforeValidator(_adapter(units.parse_gauge_pressure))]  # Pa gauge, bare number = bar
Duration = Annotated[float, BeforeValidator(_adapter(units.parse_duration))]  # s, bare number = s
# Pa, bare number = Pa: a few pascals, and a settle block is validated again when its overrides merge
SmallPressure = Annotated[float, BeforeValidator(_adapter(lambda v: units.parse_pressure(v, default_unit="Pa")))]
MAX_TIMEOUT = 3600.0  # s: the longest fill or vent time-out that still protects
# s: the longest a settle may wait.  Beyond four hours what the pressure does is a leak, a specimen taking
# up gas or a drifting lab, not gas settling; a run given 1e9 s on a drifting lab never ended (a sweep)
MAX_SETTLE_TIME = 4 * 3600.0
Volume = Annotated[float, BeforeValidator(_adapter(units.parse_volume))]  # m^3, bare number = cm^3
Rate = Annotated[float, BeforeValidator(_adapter(units.parse_rate))]  # Pa/s, bare number = Pa/s
Fraction = Annotated[float, BeforeValidator(_adapter(units.parse_fraction))]  # 1, '0.05 %' = 5e-4
Mass = Annotated[float, BeforeValidator(_adapter(units.parse_mass))]  # kg, bare number = g


def _auto_or_rate(value: Any) -> Any:
    if isinstance(value, str) and value.strip() == "auto":
        return "auto"
    return _adapter(units.parse_rate)(value)


DriftLimit = Annotated[Literal["auto"] | float, BeforeValidator(_auto_or_rate)]

Rule = tuple[Loc, str]


class _Strict(BaseModel):
    """Base of every section: unknown keys are errors, values are frozen once checked."""

    model_config = ConfigDict(extra="forbid", frozen=True)


def _raise_rules(rules: list[Rule], info: ValidationInfo) -> None:
    """Inside a model validator: report rule breaks unless load_sequence will position them itself."""
    if rules and not (info.context or {}).get(_DEFER):
        raise ValueError("; ".join(msg for _, msg in rules))


def _has(v: dict[str, Any], *keys: str) -> bool:
    return all(v.get(k) is not None for k in keys)


# --------------------------------------------------------------------------- sections


class Purge(_Strict):
    """Flush the cell with the working gas: fill to ``pressure``, hold, vent; ``pulses`` times."""

    pulses: StrictInt = Field(5, ge=0, le=50)
    pressure: Pressure = Field(gt=0)
    hold: Duration = Field(2.0, gt=0)
    vent: Duration = Field(3.0, gt=0)


class Fill(_Strict):
    """Charge the sample cell to the gauge target P1."""

    target: Pressure = Field(gt=0)
    # a fill not at its target within an hour is a closed cylinder or a failed regulator; a longer
    # time-out (1e12 s) would switch the fill_timeout interlock off without a word
    timeout: Duration = Field(60.0, gt=0, le=MAX_TIMEOUT)
    overshoot: Pressure = Field(5000.0, ge=0)  # 0.05 bar

    @model_validator(mode="after")
    def _rules(self, info: ValidationInfo) -> Fill:
        _raise_rules(fill_rules(dict(self)), info)
        return self


def fill_rules(v: dict[str, Any]) -> list[Rule]:
    """Cross-field rules of fill, on the field values that are valid (any may be missing)."""
    if _has(v, "overshoot", "target") and v["overshoot"] >= v["target"]:
        return [(("overshoot",), "overshoot must be smaller than the fill target")]
    return []


class Settle(_Strict):
    """When a pressure counts as settled: a sliding-window slope below ``max_drift``."""

    window: Duration = Field(10.0, gt=0)
    max_drift: DriftLimit = "auto"
    # the remainder rule, which replaces max_drift when given: Pa of relaxation still to come
    max_remainder: SmallPressure | None = Field(None, gt=0)
    min_time: Duration = Field(5.0, ge=0)
    max_time: Duration = Field(300.0, gt=0, le=MAX_SETTLE_TIME)
    extrapolate: StrictBool = False
    on_timeout: Literal["fault", "accept"] = "fault"

    @field_validator("max_drift")
    @classmethod
    def _positive_drift(cls, v: str | float) -> str | float:
        if v != "auto" and not v > 0:  # type: ignore[operator]
            raise PydanticCustomError("range", "max_drift must be above 0 Pa/s (or 'auto')", {})
        return v

    @model_validator(mode="after")
    def _rules(self, info: ValidationInfo) -> Settle:
        _raise_rules([(loc, msg) for loc, _, msg in settle_rules(dict(self))], info)
        return self


def settle_rules(v: dict[str, Any]) -> list[tuple[Loc, Loc, str]]:
    """Cross-field rules of a settle as (blamed key, other key, message)."""
    out: list[tuple[Loc, Loc, str]] = []
    for short in ("min_time", "window"):
        if _has(v, short, "max_time") and v[short] > v["max_time"]:
            out.append(((short,), ("max_time",),
                        f"{short} ({v[short]:g} s) must not exceed max_time ({v['max_time']:g} s)"))
    return out


class SettleOverride(_Strict):
    """The keys a settle_filled / settle_expanded / settle_baseline block may set (all optional)."""

    window: Duration | None = Field(None, gt=0)
    max_drift: DriftLimit | None = None
    max_remainder: SmallPressure | None = Field(None, gt=0)
    min_time: Duration | None = Field(None, ge=0)
    max_time: Duration | None = Field(None, gt=0, le=MAX_SETTLE_TIME)
    extrapolate: StrictBool | None = None
    on_timeout: Literal["fault", "accept"] | None = None


class Expand(_Strict):
    """Which expansion volume to open after the first settle."""

    volume: StrictStr = Field("auto", min_length=1, max_length=64)
    sample_estimate: Volume | None = Field(None, gt=0)


class Vent(_Strict):
    """Return to the vented baseline between cycles."""

    time: Duration = Field(5.0, gt=0)
    timeout: Duration = Field(60.0, gt=0, le=MAX_TIMEOUT)  # beyond an hour: the vent time-out is off
    baseline_tolerance: Pressure = Field(1000.0, gt=0)  # 1 kPa

    @model_validator(mode="after")
    def _rules(self, info: ValidationInfo) -> Vent:
        _raise_rules(vent_rules(dict(self)), info)
        return self


def vent_rules(v: dict[str, Any]) -> list[Rule]:
    if _has(v, "time", "timeout") and v["time"] > v["timeout"]:
        return [(("time",), f"time ({v['time']:g} s) must not exceed timeout ({v['timeout']:g} s)")]
    return []


class Converge(_Strict):
    """Early-stop test: the last ``last`` kept volumes all lie within ``within`` of their mean."""

    last: StrictInt = Field(2, ge=2)
    within: Fraction = 0.001  # 0.1 % each side of the mean = 0.2 % apart
    # what the result is the mean of: every kept cycle ("kept"), or, once the last ``last`` agree, only
    # those ("agreeing"): kept cycles before them were still settling in (a specimen coming to the cell's
    # temperature, giving off moisture) and are shown as warm-up, so no fixed discard has to guess how
    # many cycles that takes.  Where they never agree the result is every kept cycle, as with "kept".
    result_from: Literal["kept", "agreeing"] = "kept"

    @field_validator("within")
    @classmethod
    def _within_range(cls, v: float) -> float:
        if not 0 < v <= 0.10:
            raise _err("range", f"within must be above 0 and at most 10 %, got {v * 100:g} %")
        return v


class Cycles(_Strict):
    """How many fill/expand/vent cycles, and how many early ones are left out of the result."""

    count: StrictInt = Field(1, ge=1, le=1000)
    discard: StrictInt = Field(0, ge=0)
    converge: Converge | None = None
    stop_on_converge: StrictBool = False

    @model_validator(mode="after")
    def _rules(self, info: ValidationInfo) -> Cycles:
        _raise_rules(cycles_rules(dict(self)), info)
        return self


def cycles_rules(v: dict[str, Any]) -> list[Rule]:
    out: list[Rule] = []
    conv = v.get("converge")
    last = conv.get("last") if isinstance(conv, dict) else getattr(conv, "last", None)
    if _has(v, "discard", "count"):
        count, discard = v["count"], v["discard"]
        if discard >= count:
            out.append((("discard",), f"discard ({discard}) must be less than count ({count})"))
        elif last is not None and last > count - discard:
            out.append((("converge", "last"),
                        f"last ({last}) exceeds the kept cycles (count - discard = {count - discard})"))
    if v.get("stop_on_converge") is True and "converge" in v and conv is None:
        out.append((("stop_on_converge",), "stop_on_converge needs a converge block"))
    return out


class LeakCheck(_Strict):
    """Pressurise, settle, hold closed and fail the run if the pressure falls or rises faster than max_rate
    (a fall: gas leaving through a seal; a rise: gas coming in past the closed inlet)."""

    pressure: Pressure = Field(gt=0)
    hold: Duration = Field(gt=0)
    max_rate: Rate = Field(gt=0)


class SampleDefaults(_Strict):
    """Sample data that may instead come from the command line."""

    mass: Mass | None = Field(None, gt=0)
    bulk_volume: Volume | None = Field(None, gt=0)


# --------------------------------------------------------------------------- the sequence


class Sequence(_Strict):
    """A validated sequence; all values SI floats (pressures gauge, Pa).

    ``settle_filled``, ``settle_expanded`` and ``settle_baseline`` (the vented system closed before each
    fill) are the *effective* settles: ``settle`` with the
    keys written in the file's override block replacing its own.
    """

    format: Literal["pycnoctl-sequence/1"]
    name: Annotated[StrictStr, AfterValidator(plain)] = Field(min_length=1, max_length=80)
    description: StrictStr = Field("", max_length=2000)
    kind: Literal["measure", "calibrate", "leak_check", "purge"]
    gas: StrictStr = "helium"
    purge: Purge | None = None
    fill: Fill = Field(default_factory=lambda: Fill(target=1.3e5))
    settle: Settle = Field(default_factory=Settle)
    # None -> validated into a copy of settle (validate_default runs the merge below)
    settle_filled: Settle = Field(None, validate_default=True)  # type: ignore[assignment]
    settle_expanded: Settle = Field(None, validate_default=True)  # type: ignore[assignment]
    settle_baseline: Settle = Field(None, validate_default=True)  # type: ignore[assignment]
    expand: Expand = Field(default_factory=Expand)
    vent: Vent = Field(default_factory=Vent)
    cycles: Cycles = Field(default_factory=Cycles)
    leak_check: LeakCheck | None = None
    sample_defaults: SampleDefaults = Field(default_factory=SampleDefaults)

    _path: Path | None = PrivateAttr(default=None)
    _raw_text: str | None = PrivateAttr(default=None)
    _doc: Document | None = PrivateAttr(default=None)

    @field_validator("gas")
    @classmethod
    def _known_gas(cls, v: str) -> str:
        try:
            return get_gas(v).name
        except UnknownGas:
            raise _err("gas", f"unknown gas {v!r}; choose one of: {', '.join(GASES)}") from None

    @field_validator("settle_filled", "settle_expanded", "settle_baseline", mode="before")
    @classmethod
    def _merge_settle(cls, v: Any, info: ValidationInfo) -> Any:
        """Effective settle = the base settle with the override's keys replacing its own."""
        if v is None:
            v = {}
        if not isinstance(v, dict):
            return v  # let the Settle type report it
        base = info.data.get("settle")
        if not isinstance(base, Settle):  # the base itself is invalid and already reported
            base = Settle()
        merged = base.model_dump()
        merged.update(v)
        return merged

    @model_validator(mode="after")
    def _rules(self, info: ValidationInfo) -> Sequence:
        _raise_rules(kind_rules(self.model_dump(exclude_unset=True)), info)
        return self

    # ---- what load_sequence remembers
    @property
    def path(self) -> Path | None:
        """The file this sequence was loaded from (None when built in code)."""
        return self._path

    @property
    def raw_text(self) -> str | None:
        """The exact text of the file as read (for the run record)."""
        return self._raw_text

    @property
    def doc(self) -> Document | None:
        """The parsed document with key positions (for positioned problems later)."""
        return self._doc

    @property
    def expands(self) -> bool:
        return self.kind in EXPANDING_KINDS


def kind_rules(data: Any) -> list[Rule]:
    """Sections each kind needs, decided on plain data (raw YAML or a dumped model); never raises."""
    if not isinstance(data, dict):
        return []
    kind = data.get("kind")
    if not isinstance(kind, str):
        return []
    out: list[Rule] = []
    if kind in EXPANDING_KINDS:
        for key in ("fill", "expand", "cycles"):
            if data.get(key) is None:
                article = "an" if key[:1] in "aeiou" else "a"
                out.append((("kind",), f"kind {kind} needs {article} '{key}' section"))
        expand = data.get("expand")
        # a calibration runs every expansion volume in turn (pycnoctl calibrate names each), so its
        # 'auto' needs no estimate of a sample it does not have
        if isinstance(expand, dict) and expand.get("volume", "auto") == "auto" and kind != "calibrate" \
                and expand.get("sample_estimate") is None:
            loc: Loc = ("expand", "volume") if "volume" in expand else ("expand",)
            out.append((loc, "volume 'auto' needs expand.sample_estimate (the expected sample volume)"))
    elif kind == "leak_check":
        if data.get("leak_check") is None:
            out.append((("kind",), "kind leak_check needs a 'leak_check' section"))
    elif kind == "purge":
        purge = data.get("purge")
        if purge is None:
            out.append((("kind",), "kind purge needs a 'purge' section"))
        elif isinstance(purge, dict) and type(purge.get("pulses")) is int and purge["pulses"] == 0:
            out.append((("purge", "pulses"), "kind purge needs at least one pulse"))
    return out


# --------------------------------------------------------------------------- loading


_ADAPTERS: dict[tuple[type[BaseModel], str], TypeAdapter[Any]] = {}


def _field_adapter(model: type[BaseModel], name: str) -> TypeAdapter[Any]:
    key = (model, name)
    if key not in _ADAPTERS:
        info = model.model_fields[name]
        _ADAPTERS[key] = TypeAdapter(Annotated[info.annotation, *info.metadata])  # type: ignore[misc]
    return _ADAPTERS[key]


def _partial(model: type[BaseModel], raw: Any) -> dict[str, Any]:
    """Validate field by field: the values that are valid on their own, defaults for absent keys.

    This lets cross-field rules run even when a neighbouring key of the same section is wrong,
    so a file's problems all come out in one pass.  Nested sections come back as plain dicts.
    """
    out: dict[str, Any] = {}
    if not isinstance(raw, dict):
        return out
    for name, info in model.model_fields.items():
        if name in raw:
            sub = raw[name]
            ann = info.annotation
            nested = next((t for t in (ann, *getattr(ann, "__args__", ())) if isinstance(t, type)
                           and issubclass(t, BaseModel)), None)
            if nested is not None and isinstance(sub, dict):
                out[name] = _partial(nested, sub)
                continue
            try:
                out[name] = _field_adapter(model, name).validate_python(sub, context={_DEFER: True})
            except (ValidationError, TypeError, ValueError):
                continue
        elif not info.is_required():
            out[name] = info.get_default(call_default_factory=True)
    return out


def _section_rules(data: Any) -> list[Rule]:
    """Cross-field rules on the valid parts of plain data; each rule is positioned at its key."""
    if not isinstance(data, dict):
        return []
    out: list[Rule] = list(kind_rules(data))
    for key, model, rules in (("fill", Fill, fill_rules), ("vent", Vent, vent_rules),
                              ("cycles", Cycles, cycles_rules)):
        if isinstance(data.get(key), dict):
            out.extend(((key, *loc), msg) for loc, msg in rules(_partial(model, data[key])))
    base = _partial(Settle, data.get("settle") if data.get("settle") is not None else {})
    if isinstance(data.get("settle"), dict):
        out.extend((("settle", *loc), msg) for loc, _, msg in settle_rules(base))
    for key in ("settle_filled", "settle_expanded", "settle_baseline"):
        raw = data.get(key)
        if not isinstance(raw, dict) or not raw:
            continue
        over = {k: v for k, v in _partial(SettleOverride, raw).items() if v is not None and k in raw}
        merged = {**base, **over}
        for loc, other, msg in settle_rules(merged):
            # blame the override only for a break it takes part in; a break of settle is reported there
            if loc[0] in over or other[0] in over:
                blamed = loc if loc[0] in over else other
                out.append(((key, *blamed), f"{msg} (after merging with settle)"))
    return out


def _problem_key(p: Problem) -> tuple[int, int, str]:
    return (p.line, p.col, p.message)


def _yaml_loc(data: Any, loc: tuple[Any, ...], *, keep_last: bool) -> Loc:
    """The part of a pydantic error location that is a path in the data (drops union/validator tags).

    ``keep_last`` keeps a final element that is not in the data: the name of a missing key, for the
    message (the position then falls back to its parent).
    """
    out: list[str | int] = []
    node = data
    for n, part in enumerate(loc):
        in_dict = isinstance(node, dict) and part in node
        if in_dict or (isinstance(node, list) and isinstance(part, int) and 0 <= part < len(node)):
            out.append(part)
            node = node[part]
        elif keep_last and n == len(loc) - 1:
            out.append(part)
        else:
            node = None
    return tuple(out)


def _positioned(doc: Document, exc: ValidationError) -> list[Problem]:
    """pydantic errors -> problems at the key they concern, in the wording yamlio uses."""
    out = []
    for err in exc.errors():
        loc = _yaml_loc(doc.data, tuple(err["loc"]), keep_last=err["type"] == "missing")
        dotted = ".".join(map(str, loc))
        if err["type"] == "extra_forbidden":
            msg = _unknown_key(loc) if loc else "unknown key"
        elif err["type"] == "missing":
            msg = f"missing key {loc[-1]!r}" if loc else "missing value"
        elif err["type"] == "invalid_key":
            msg = f"key {err.get('input')!r} is not text"
        elif err["type"] in ("string_type", "literal_error") and isinstance(err.get("input"), list | dict):
            got = err["input"]
            what = (f"a list ({', '.join(map(str, got))[:60]})" if isinstance(got, list) else "a mapping of keys")
            msg = f"{dotted}: expected one name, got {what}; write a single value, e.g. {dotted.split('.')[-1]}: " \
                  f"{got[0] if isinstance(got, list) and got else 'NAME'}"
        elif err["type"] in _BOUNDS and loc and isinstance(err.get("input"), int | float):
            word, key = _BOUNDS[err["type"]]
            unit = " s" if loc[-1] in _SECONDS else ""
            msg = f"{dotted}: {err['input']:g}{unit} must be {word} {err['ctx'][key]:g}{unit}"
        else:
            text = err["msg"].removeprefix("Value error, ")  # pydantic's tag on a validator's own sentence
            msg = f"{dotted}: {text}" if dotted else text
        out.append(doc.problem(loc, msg))
    return out


# pydantic's bound errors in words with the unit: 'Input should be less than or equal to 14400' did not say
# 14400 what (a duration was given in hours or ms, and compared in seconds)
_BOUNDS = {"less_than_equal": ("at most", "le"), "less_than": ("below", "lt"),
           "greater_than_equal": ("at least", "ge"), "greater_than": ("above", "gt")}
_SECONDS = frozenset({"timeout", "max_time", "min_time", "window", "hold", "time"})


def _fields_at(loc: Loc) -> list[str]:
    """The keys the sequence format allows at a place in the file (the section of a misspelt key)."""
    model: Any = Sequence
    for key in loc:
        fields = getattr(model, "model_fields", None)
        if not isinstance(key, str) or not fields or key not in fields:
            return []
        model = _model_of(fields[key].annotation)
    fields = getattr(model, "model_fields", None)
    return list(fields) if fields else []


def _model_of(annotation: Any) -> Any:
    """The pydantic model inside an annotation such as ``Purge | None`` (None when there is none)."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return annotation
    for arg in typing.get_args(annotation):
        found = _model_of(arg)
        if found is not None:
            return found
    return None


def _unknown_key(loc: Loc) -> str:
    """'unknown key' with the nearest allowed spelling, or the allowed keys when none is near."""
    key = str(loc[-1])
    allowed = _fields_at(loc[:-1])
    near = difflib.get_close_matches(key, allowed, n=1, cutoff=0.6)
    if near:
        return f"unknown key {key!r}; did you mean {near[0]!r}?"
    return f"unknown key {key!r}"


def _validated(doc: Document, early: list[Problem] | None = None) -> Sequence:
    problems: list[Problem] = list(early or [])
    seq: Sequence | None = None
    told = {p.line for p in problems}  # a line whose YAML was refused (a tag): its value's error is the same one
    try:
        seq = Sequence.model_validate(doc.data, context={_DEFER: True})
    except ValidationError as exc:
        problems.extend(p for p in _positioned(doc, exc) if p.line not in told)
    problems.extend(doc.problem(loc, f"{'.'.join(map(str, loc))}: {msg}")
                    for loc, msg in _section_rules(doc.data))
    if problems or seq is None:
        unique = {_problem_key(p): p for p in problems}
        raise ConfigError(sorted(unique.values(), key=_problem_key))
    return seq


def sequence_from_text(text: str, name: str = "<stored sequence>") -> Sequence:
    """A sequence from its text, checked exactly like a file (a run record keeps the text it ran)."""
    if len(text.encode("utf-8")) > MAX_BYTES:
        raise ConfigError([Problem(name, 1, 1, f"sequence text is larger than {MAX_BYTES} bytes")])
    early: list[Problem] = []
    doc = parse_text(text, name, collect=early)
    seq = _validated(doc, early)
    seq._raw_text = text
    seq._doc = doc
    return seq


def load_sequence(path: str | Path) -> Sequence:
    """Load and check a sequence file; raises ConfigError listing every problem with file:line:col.

    The returned model keeps ``path``, ``raw_text`` (exactly the text that was validated) and ``doc``.
    """
    try:
        with open(path, "rb") as fh:
            before = fh.read(MAX_BYTES + 1)
    except OSError:
        before = None  # load_file reports the unreadable file
    early: list[Problem] = []  # duplicate keys and tags: told with the schema's problems, in one pass
    doc = load_file(path, collect=early)  # strict YAML: size cap, UTF-8, no tags/aliases/duplicates, positioned
    seq = _validated(doc, early)
    try:
        after = Path(path).read_bytes()
    except OSError:
        after = None
    if after is None or after != before:  # edited while we read it: what we checked is not what is there
        raise ConfigError([Problem(str(path), 1, 1, "the file changed while it was being read; load it again")])
    seq._path = Path(path)
    seq._raw_text = after.decode("utf-8")
    seq._doc = doc
    return seq


# --------------------------------------------------------------------------- instrument checks


def check_against_instrument(
    seq: Sequence,
    *,
    expansion_volumes: Iterable[str],
    max_pressure: float,
    gas: str | None,
    sample_period: float | None = None,
    doc: Document | None = None,
    margin: float = DEFAULT_MARGIN,
) -> tuple[list[Problem], list[str]]:
    """Rules that need the instrument: expansion-volume names, pressures under the trip, the gas, and
    settle windows that hold enough samples at the instrument's ``sample_period`` (s; None: not checked).

    Every pressurising setpoint plus ``fill.overshoot`` (the overshoot allowance applies to every
    fill: the measurement fill, each purge pulse and the leak-check fill) must stay at or below
    ``max_pressure * (1 - margin)``; all pressures are gauge, Pa.  Returns (problems, warnings);
    problems are positioned in ``doc`` (default: the document the sequence was loaded from).
    """
    if not (max_pressure > 0 and math.isfinite(max_pressure)):
        raise ValueError(f"max_pressure must be a positive pressure in Pa, got {max_pressure!r}")
    if not 0 <= margin < 1:
        raise ValueError(f"margin must be in [0, 1), got {margin!r}")
    d = doc if doc is not None else seq.doc
    name = str(seq.path) if seq.path is not None else f"<sequence {seq.name}>"

    def problem(loc: Loc, msg: str) -> Problem:
        return d.problem(loc, msg) if d is not None else Problem(name, 1, 1, msg)

    problems: list[Problem] = []
    warnings: list[str] = []
    names = list(expansion_volumes)
    if seq.expands:
        if seq.expand.volume == "auto":
            if not names:
                problems.append(problem(("expand", "volume"), "the instrument has no expansion volume"))
        elif seq.expand.volume not in names:
            problems.append(problem(("expand", "volume"),
                                    f"unknown expansion volume {seq.expand.volume!r}; the instrument has: "
                                    f"{', '.join(names) or 'none'}"))

    limit = max_pressure * (1.0 - margin)
    over = seq.fill.overshoot
    setpoints: list[tuple[Loc, str, float]] = []
    if seq.expands:
        setpoints.append((("fill", "target"), "fill.target", seq.fill.target))
    if seq.purge is not None and seq.purge.pulses > 0:
        setpoints.append((("purge", "pressure"), "purge.pressure", seq.purge.pressure))
    if seq.kind == "leak_check" and seq.leak_check is not None:
        setpoints.append((("leak_check", "pressure"), "leak_check.pressure", seq.leak_check.pressure))
    for loc, label, p in setpoints:
        if p + over > limit:
            problems.append(problem(loc, (
                f"{label} {p / 1e5:.4g} bar + overshoot {over / 1e5:.3g} bar exceeds "
                f"{limit / 1e5:.4g} bar (max_pressure {max_pressure / 1e5:.4g} bar less a "
                f"{margin * 100:g} % margin)")))

    wide = vented_band_problem("vent.baseline_tolerance", seq.vent.baseline_tolerance, max_pressure,
                               "the instrument's max_pressure")
    if wide is not None:  # the vent's band against the instrument's trip, as the instrument's own is held
        problems.append(problem(("vent", "baseline_tolerance"), wide))

    if sample_period is not None:
        problems.extend(problem(loc, msg) for loc, msg in window_rules(seq, sample_period))

    if gas is not None:
        try:
            inst_gas = get_gas(gas).name
        except UnknownGas:
            warnings.append(f"the instrument's gas {gas!r} is unknown; the sequence asks for {seq.gas}")
        else:
            if inst_gas != seq.gas:  # its volumes, calibration and real-gas terms are for another gas
                problems.append(problem(("gas",), f"the sequence measures in {seq.gas} but the instrument is "
                                        f"plumbed for {inst_gas}: change the instrument's gas (and calibrate "
                                        "in it) or use a sequence written for it"))
    return problems, warnings


def _settles_used(seq: Sequence) -> tuple[str, ...]:
    """The effective settles a run of ``seq`` goes through (a purge has none; a leak check no P2)."""
    if seq.expands:
        return ("settle_baseline", "settle_filled", "settle_expanded")
    if seq.kind == "leak_check":
        return ("settle_baseline", "settle_filled")
    return ()


def window_rules(seq: Sequence, sample_period: float) -> list[Rule]:
    """Each settle window that holds fewer samples than the drift test needs, at the key that sets it.

    Why here and not in the file's own rules: a window is in seconds and the samples come at the
    instrument's period, so only the two together say how many a window holds.  The detector fits a
    straight line to the window and tests its slope, which has a standard error only from three samples
    on (controller.maths.settle.MIN_WINDOW_SAMPLES); below that a settle can never decide, and the run
    ended in a time-out (or, with a fixed max_drift, in a ZeroDivisionError before it started).
    An override's window is blamed at the override, the base settle's once, at settle.window."""
    from pycnoctl.controller.maths.settle import MIN_WINDOW_SAMPLES, min_window, window_samples

    if not (sample_period > 0 and math.isfinite(sample_period)):
        raise ValueError(f"sample_period must be a positive number of seconds, got {sample_period!r}")
    raw = seq.doc.data if seq.doc is not None and isinstance(seq.doc.data, dict) else {}
    out: list[Rule] = []
    seen: set[Loc] = set()
    for key in _settles_used(seq):
        window = getattr(seq, key).window
        n = window_samples(window, sample_period)
        if n >= MIN_WINDOW_SAMPLES:
            continue
        over = raw.get(key)
        source = key if isinstance(over, dict) and "window" in over else "settle"
        loc: Loc = (source, "window")
        if loc in seen:
            continue
        seen.add(loc)
        out.append((loc, f"{source}.window {window:g} s holds {n} sample{'s' if n != 1 else ''} at this "
                         f"instrument's sample period of {sample_period:g} s; the settle's drift test fits a "
                         f"straight line and needs at least {MIN_WINDOW_SAMPLES} samples for its slope to have a "
                         f"standard error: make the window at least {min_window(sample_period):g} s"))
    return out


# --------------------------------------------------------------------------- shipped files


class SequenceNotFound(FileNotFoundError):
    """A sequence name or path that is neither a file nor a shipped sequence."""


def list_shipped() -> dict[str, Path]:
    """Shipped sequences by name (the file stem), from the pycnoctl.sequences package data."""
    root = importlib.resources.files("pycnoctl.sequences")
    out = {}
    for entry in root.iterdir():
        if entry.name.endswith(".yaml") and entry.is_file():
            out[entry.name[: -len(".yaml")]] = Path(str(entry))
    return dict(sorted(out.items()))


def not_for_a_run(seq: Sequence) -> str | None:
    """Why ``seq`` cannot be a run of its own (None when it can).

    A calibration sequence measures spheres of known volume, one run per sphere, and fits the chamber
    volumes from all of them: only ``calibrate`` does that.  Started as a run it measured the empty cell
    with the nominal volumes and stored no calibration (found by a sweep: an operator may then believe
    the instrument calibrated)."""
    if seq.kind == "calibrate":
        return (f"sequence {seq.name!r} is a calibration sequence (kind: calibrate): run it with pycnoctl "
                "calibrate, which measures each sphere with it and fits and stores the chamber volumes; as a "
                "run of its own it would store no calibration")
    return None


def resolve_sequence(name_or_path: str | Path) -> Path:
    """An existing file path is used as is; a bare name ('quick-demo' or 'quick-demo.yaml') is shipped."""
    p = Path(name_or_path)
    if p.is_file() or p.exists():  # a directory or a device: load_sequence says what it is, as file:1:1
        return p
    text = str(name_or_path)
    if "/" not in text and "\\" not in text:
        stem = text[: -len(".yaml")] if text.endswith(".yaml") else text
        shipped = list_shipped()
        if stem in shipped:
            return shipped[stem]
        raise SequenceNotFound(f"no sequence file {text!r} and no shipped sequence of that name; "
                               f"shipped: {', '.join(shipped)}")
    raise SequenceNotFound(f"no sequence file {text!r}")


# --------------------------------------------------------------------------- static duration


def _settle_time(s: Settle, typical: float | None) -> float:
    t = max(s.min_time, s.window) if typical is None else typical
    return min(max(t, 0.0), s.max_time)


def earliest_cycles(seq: Sequence) -> int:
    """The fewest cycles a run of ``seq`` can end after: ``discard + last`` where it stops once its last
    cycles agree, else ``count``."""
    c = seq.cycles
    if seq.expands and c.stop_on_converge and c.converge is not None:
        return min(c.count, c.discard + c.converge.last)
    return c.count


def estimate_duration(seq: Sequence, *, fill_time: float = 5.0, settle_typical: float | None = None,
                      cycles: int | None = None) -> float:
    """Static estimate of instrument time in s, before any run (the engine's dry run gives the real one).

    Each settle is taken as ``settle_typical`` or else the earliest it can be accepted,
    max(min_time, window), never beyond max_time; each fill takes ``fill_time``; valves switch
    instantly.  Purge: pulses x (fill + hold + vent).  Measure/calibrate: every cycle runs
    (converge may stop earlier) as fill + settle_filled + settle_expanded + vent.time + the baseline
    settle (``cycles`` of them: ``earliest_cycles`` for a run that stops as soon as it can).  Leak check:
    fill + settle_filled + hold + vent.time.
    """
    total = 0.0
    if seq.purge is not None:
        total += seq.purge.pulses * (fill_time + seq.purge.hold + seq.purge.vent)
    if seq.expands:
        per_cycle = (fill_time + _settle_time(seq.settle_filled, settle_typical)
                     + _settle_time(seq.settle_expanded, settle_typical) + seq.vent.time
                     + _settle_time(seq.settle_baseline, settle_typical))
        total += (seq.cycles.count if cycles is None else cycles) * per_cycle
    elif seq.kind == "leak_check" and seq.leak_check is not None:
        total += (fill_time + _settle_time(seq.settle_filled, settle_typical)
                  + seq.leak_check.hold + seq.vent.time)
    return total


def phase_times(seq: Sequence, *, fill_time: float = 5.0) -> dict[str, float]:
    """The static duration of each run state (instrument s), on the same assumptions as
    estimate_duration: the live view's time left starts from these and replaces each by what the
    run shows."""
    out = {"fill": fill_time, "expand": 0.0, "vent": seq.vent.time,
           "baseline": _settle_time(seq.settle_baseline, None),
           "settle_filled": _settle_time(seq.settle_filled, None),
           "settle_expanded": _settle_time(seq.settle_expanded, None)}
    if seq.purge is not None:
        out.update(purge_fill=fill_time, purge_hold=seq.purge.hold, purge_vent=seq.purge.vent)
    if seq.leak_check is not None:
        out["leak_hold"] = seq.leak_check.hold
    return out
