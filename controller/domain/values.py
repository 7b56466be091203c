"""Value classes without dataclasses: equality, hashing and repr over a list of fields.

Why not ``@dataclass``: importing dataclasses brings inspect, and with the building of the value
classes on the ``pycnoctl compute`` path that cost the command 8.5 ms of its 27.4 ms start
(bench/bench_startup.py).  Those classes take these bases instead, and keep what they had as
dataclasses: == over their fields (objects of the same class only), the repr, and, frozen, a hash;
a mutable one is unhashable, as an eq-only dataclass is.
"""

from __future__ import annotations


class Value:
    """Equal to an object of the same class whose ``_COMPARED`` fields are equal; its repr shows the
    ``_SHOWN`` fields.  Both default to ``_FIELDS``, which a subclass lists in constructor order."""

    _FIELDS: tuple[str, ...] = ()
    _COMPARED: tuple[str, ...] | None = None
    _SHOWN: tuple[str, ...] | None = None

    def _key(self) -> tuple[object, ...]:
        return tuple(getattr(self, f) for f in (self._FIELDS if self._COMPARED is None else self._COMPARED))

    def __eq__(self, other: object) -> bool:  # defining it alone leaves the class unhashable
        if other.__class__ is not self.__class__:
            return NotImplemented
        assert isinstance(other, Value)
        return self._key() == other._key()

    def __repr__(self) -> str:
        shown = self._FIELDS if self._SHOWN is None else self._SHOWN
        return f"{type(self).__qualname__}({', '.join(f'{f}={getattr(self, f)!r}' for f in shown)})"


class FrozenValue(Value):
    """A Value whose fields are set once, in ``__init__`` through ``_freeze``, and that hashes."""

    def _freeze(self, **fields: object) -> None:
        for name, value in fields.items():
            object.__setattr__(self, name, value)

    def __setattr__(self, name: str, value: object) -> None:
        raise AttributeError(f"cannot assign to field {name!r}")

    def __delattr__(self, name: str) -> None:
        raise AttributeError(f"cannot delete field {name!r}")

    def __hash__(self) -> int:
        return hash(self._key())
