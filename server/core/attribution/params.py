"""Parameter schemas for attribution methods: declare, describe, validate.

A method declares its parameters once as :class:`Param` records; :meth:`ParamSchema.validate`
turns whatever a caller sent (CLI strings, JSON values, Python numbers) into a complete, typed
dict, or raises :class:`BadParameterError` saying what was received and what is allowed.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, Literal

from pellucid.core.errors import BadParameterError

__all__ = ["Param", "ParamSchema"]

Kind = Literal["int", "float", "str", "choice"]


@dataclass(frozen=True)
class Param:
    """One parameter: its type, default, allowed range or choices, and a one-line help text.

    A ``None`` default means "chosen automatically" (for example Grad-CAM's layer); the method
    records what it chose in the result's params.
    """

    name: str
    kind: Kind
    default: Any
    help: str
    min: float | None = None
    max: float | None = None
    choices: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        # Programmer misconfiguration, not user input: assert like Starlette does.
        assert self.kind in ("int", "float", "str", "choice"), self.kind
        assert self.kind != "choice" or self.choices, f"choice parameter {self.name} needs choices"
        if self.default is not None:
            self.coerce(self.default)

    def allowed(self) -> str:
        """The allowed values in words, for error messages and help."""
        if self.kind == "choice":
            return "one of " + ", ".join(repr(c) for c in self.choices)
        if self.kind == "str":
            return "a text value"
        noun = "an integer" if self.kind == "int" else "a finite number"
        if self.min is not None and self.max is not None:
            return f"{noun} from {_fmt(self.min)} to {_fmt(self.max)}"
        if self.min is not None:
            return f"{noun} >= {_fmt(self.min)}"
        if self.max is not None:
            return f"{noun} <= {_fmt(self.max)}"
        return noun

    def coerce(self, value: Any) -> Any:
        """``value`` converted to this parameter's type and checked against its range."""
        if value is None:
            if self.default is None:
                return None
            return self.default
        if self.kind == "int":
            out: Any = self._to_int(value)
        elif self.kind == "float":
            out = self._to_float(value)
        elif self.kind == "str":
            if not isinstance(value, str):
                raise self._bad(value)
            out = value.strip()
        else:
            text = value.strip().lower() if isinstance(value, str) else None
            if text not in self.choices:
                raise self._bad(value)
            out = text
        if self.kind in ("int", "float") and (
            (self.min is not None and out < self.min) or (self.max is not None and out > self.max)
        ):
            raise self._bad(value)
        return out

    def describe(self) -> dict[str, Any]:
        """A JSON-able description for the UI, the CLI's help and the API."""
        return {
            "name": self.name,
            "type": self.kind,
            "default": self.default,
            "min": self.min,
            "max": self.max,
            "choices": list(self.choices),
            "help": self.help,
            "allowed": self.allowed(),
        }

    def _to_int(self, value: Any) -> int:
        if isinstance(value, bool):
            raise self._bad(value)
        if isinstance(value, int):
            return value
        if isinstance(value, float):
            if math.isfinite(value) and value.is_integer():
                return int(value)
            raise self._bad(value)
        if isinstance(value, str):
            try:
                return int(value.strip())
            except ValueError:
                try:
                    as_float = float(value.strip())
                except ValueError:
                    raise self._bad(value) from None
                return self._to_int(as_float)
        raise self._bad(value)

    def _to_float(self, value: Any) -> float:
        if isinstance(value, bool):
            raise self._bad(value)
        if isinstance(value, (int, float)):
            out = float(value)
        elif isinstance(value, str):
            try:
                out = float(value.strip())
            except ValueError:
                raise self._bad(value) from None
        else:
            raise self._bad(value)
        if not math.isfinite(out):
            raise self._bad(value)
        return out

    def _bad(self, value: Any) -> BadParameterError:
        return BadParameterError(
            f"parameter {self.name!r} must be {self.allowed()}; received {value!r}. {self.help}"
        )


@dataclass(frozen=True)
class ParamSchema:
    """The ordered parameters of one method."""

    params: tuple[Param, ...] = field(default_factory=tuple)

    def __post_init__(self) -> None:
        names = [p.name for p in self.params]
        assert len(names) == len(set(names)), f"duplicate parameter names in {names}"

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.params)

    def validate(self, params: Mapping[str, Any] | None, *, method: str = "") -> dict[str, Any]:
        """A complete dict: defaults filled in, values coerced, unknown keys rejected.

        Raises :class:`BadParameterError` naming the offending key and the allowed values.
        """
        given = dict(params or {})
        unknown = sorted(k for k in given if k not in self.names)
        if unknown:
            where = f" for method {method!r}" if method else ""
            known = ", ".join(self.names) if self.params else "none"
            raise BadParameterError(
                f"unknown parameter(s) {', '.join(map(repr, unknown))}{where}; "
                f"known parameters: {known}"
            )
        return {p.name: p.coerce(given.get(p.name)) for p in self.params}

    def describe(self) -> list[dict[str, Any]]:
        return [p.describe() for p in self.params]


def _fmt(v: float) -> str:
    return str(int(v)) if float(v).is_integer() else repr(v)
