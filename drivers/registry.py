"""The driver registry: each driver module registers its config model and builder under a kind.

Why a registry: the instrument loader must not know the drivers.  A driver module calls
register() at import; discover() imports every module of this package (pkgutil, so a new
shipped driver is one new file, with no list to extend) and every module named in the
'pycnoctl.drivers' entry-point group (so a driver in another installed package plugs in
without touching this tree).  device_type() turns the kinds that serve one protocol into the
pydantic union the instrument config uses; its "unknown kind" error lists them.
"""

from __future__ import annotations

import importlib
import pkgutil
from collections.abc import Callable
from dataclasses import dataclass, field
from importlib.metadata import entry_points
from typing import Annotated, Any, Union

from pydantic import BaseModel, Discriminator, Tag

from pycnoctl.controller.domain.clock import Clock

# What a device does for the instrument, not which role it plays: a barometer and a supply
# gauge are both 'pressure' devices, so a new role reuses these and needs no new kind.
VALVES, PRESSURE, TEMPERATURE = "valves", "pressure", "temperature"
ENTRY_POINT_GROUP = "pycnoctl.drivers"


@dataclass
class BuildContext:
    """What a builder gets besides its config: the role it serves, the clock, shared resources.

    `shared` holds what several roles use together (one serial port, the simulator); `opened`
    collects what the builder opened, closed again if a later role fails to build.
    """

    role: str
    clock: Clock
    shared: dict[str, Any] = field(default_factory=dict)
    opened: list[Any] = field(default_factory=list)

    def once(self, key: str, make: Callable[[], Any]) -> Any:
        """The resource under key, made (and remembered for closing) the first time it is asked for."""
        if key not in self.shared:
            self.shared[key] = make()
            self.opened.append(self.shared[key])
        return self.shared[key]


@dataclass(frozen=True)
class DriverKind:
    """One kind of device: its name in the config, the protocols it serves, its model and builder."""

    kind: str
    serves: frozenset[str]
    model: type[BaseModel]
    build: Callable[[Any, BuildContext], Any]


_KINDS: dict[str, DriverKind] = {}
_discovered = False


def register(kind: str, serves: str | tuple[str, ...], model: type[BaseModel],
             build: Callable[[Any, BuildContext], Any]) -> None:
    """Make `kind` known; the model must have a field `kind: Literal[kind]`."""
    entry = DriverKind(kind, frozenset((serves,) if isinstance(serves, str) else serves), model, build)
    old = _KINDS.get(kind)
    if old is not None and (old.model, old.build) != (model, build):
        raise ValueError(f"driver kind {kind!r} registered twice ({old.model.__module__}, {model.__module__})")
    _KINDS[kind] = entry


def discover() -> None:
    """Import every module of this package and every entry-point driver, once.

    A module that is half-imported (the one calling this at its own import) is skipped by the
    import system, so a nested call still completes the registration.
    """
    global _discovered
    if _discovered:
        return
    package = importlib.import_module(__package__ or "pycnoctl.drivers")
    for info in pkgutil.iter_modules(package.__path__, package.__name__ + "."):
        importlib.import_module(info.name)
    for ep in entry_points(group=ENTRY_POINT_GROUP):
        ep.load()
    _discovered = True


def kinds(serves: str | None = None) -> dict[str, DriverKind]:
    """The registered kinds (serving one protocol, if given), by name."""
    discover()
    return {k: v for k, v in sorted(_KINDS.items()) if serves is None or serves in v.serves}


def lookup(model: BaseModel) -> DriverKind:
    """The kind whose model validated this device config."""
    return _KINDS[model.kind]  # type: ignore[attr-defined]


def _kind(value: Any) -> str | None:
    kind = value.get("kind") if isinstance(value, dict) else getattr(value, "kind", None)
    return f"[{kind}]" if isinstance(kind, str) else None


def device_type(serves: str) -> Any:
    """The discriminated union of every kind serving `serves`, for a field of the instrument config."""
    found = kinds(serves)
    if not found:
        raise LookupError(f"no driver serves {serves!r}")
    # Tags carry '[..]' so yamlio drops them from error locations (they are not YAML keys).
    members = tuple(Annotated[k.model, Tag(f"[{name}]")] for name, k in found.items())
    message = f"kind must be one of {', '.join(found)} (the registered {serves} kinds)"
    return Annotated[Union[members],  # noqa: UP007 (a runtime tuple of members needs Union[...])
                     Discriminator(_kind, custom_error_type="kind", custom_error_message=message)]
