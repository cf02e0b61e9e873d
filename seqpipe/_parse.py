"""Small validators shared by every recipe section and step.

Each raises :class:`RecipeError` whose key is the field name; the section
builder (:func:`section`) prefixes the path, so a user reads
``recipe.vocabulary.cap: expected a positive integer, got -3``.
"""

from __future__ import annotations

import dataclasses
import difflib
from collections.abc import Mapping, Sequence
from typing import Any, Final, TypeVar

from seqpipe.errors import RecipeError

T = TypeVar("T")


def _show(value: Any) -> str:
    try:
        text = repr(value)
    except ValueError:  # an int past Python's digit limit for str()
        return f"an integer of {value.bit_length()} bits"
    return text if len(text) <= 80 else text[:77] + "..."


INT64_MAX: Final = (1 << 63) - 1


def parse_int(key: str, value: Any, *, minimum: int | None = None, maximum: int | None = None) -> int:
    """An integer (not a bool) within the given bounds."""
    if isinstance(value, bool) or not isinstance(value, int):
        raise RecipeError(key, f"expected an integer, got {_show(value)}")
    if minimum is not None and value < minimum:
        what = "a positive integer" if minimum == 1 else f"an integer >= {minimum}"
        raise RecipeError(key, f"expected {what}, got {value}")
    # Every count, size and seed ends up in a 64-bit field (numpy, Arrow, the manifest's readers).
    limit = INT64_MAX if maximum is None else min(maximum, INT64_MAX)
    if value > limit:
        raise RecipeError(key, f"expected an integer <= {limit}, got {_show(value)}")
    return value


def parse_optional_int(key: str, value: Any, *, minimum: int | None = None) -> int | None:
    """``None`` or an integer within bounds."""
    return None if value is None else parse_int(key, value, minimum=minimum)


def parse_float(key: str, value: Any, *, minimum: float | None = None, maximum: float | None = None) -> float:
    """A number (int or float, not bool) within the given closed bounds."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise RecipeError(key, f"expected a number, got {_show(value)}")
    number = float(value)
    if number != number or number in (float("inf"), float("-inf")):
        raise RecipeError(key, f"expected a finite number, got {_show(value)}")
    if minimum is not None and number < minimum:
        raise RecipeError(key, f"expected a number >= {minimum}, got {_show(value)}")
    if maximum is not None and number > maximum:
        raise RecipeError(key, f"expected a number <= {maximum}, got {_show(value)}")
    return number


def parse_bool(key: str, value: Any) -> bool:
    """A boolean."""
    if not isinstance(value, bool):
        raise RecipeError(key, f"expected true or false, got {_show(value)}")
    return value


def parse_str(key: str, value: Any, *, choices: Sequence[str] | None = None, allow_empty: bool = False) -> str:
    """A string, optionally one of ``choices``."""
    if not isinstance(value, str):
        raise RecipeError(key, f"expected a string, got {_show(value)}")
    if not allow_empty and value == "":
        raise RecipeError(key, "expected a non-empty string")
    if choices is not None and value not in choices:
        hint = difflib.get_close_matches(value, choices, n=1)
        extra = f" (did you mean {hint[0]!r}?)" if hint else ""
        raise RecipeError(key, f"expected one of {', '.join(map(repr, choices))}, got {_show(value)}{extra}")
    return value


def parse_str_tuple(key: str, value: Any, *, allow_empty_items: bool = False) -> tuple[str, ...]:
    """A list of strings, stored as a tuple."""
    if isinstance(value, str) or not isinstance(value, (list, tuple)):
        raise RecipeError(key, f"expected a list of strings, got {_show(value)}")
    return tuple(parse_str(f"{key}[{i}]", v, allow_empty=allow_empty_items) for i, v in enumerate(value))


def check_keys(path: str, data: Any, allowed: Sequence[str]) -> Mapping[str, Any]:
    """``data`` must be a table whose keys are all in ``allowed``."""
    if not isinstance(data, Mapping):
        raise RecipeError(path, f"expected a table, got {_show(data)}")
    for k in data:
        if not isinstance(k, str) or k not in allowed:
            hint = difflib.get_close_matches(str(k), allowed, n=1)
            extra = f" (did you mean {hint[0]!r}?)" if hint else ""
            raise RecipeError(
                f"{path}.{k}" if path else str(k), f"unknown key{extra}; allowed keys: {', '.join(sorted(allowed))}"
            )
    return data


def init_fields(cls: type) -> list[str]:
    """Names of a dataclass's constructor fields."""
    return [f.name for f in dataclasses.fields(cls) if f.init]


def section(cls: type[T], data: Any, path: str, *, skip: Sequence[str] = ()) -> T:
    """Build dataclass ``cls`` from a table, naming ``path`` in every error.

    Keys in ``skip`` (e.g. a ``kind`` discriminator) are allowed but not passed on.
    """
    allowed = init_fields(cls)
    table = check_keys(path, data, [*allowed, *skip])
    kwargs = {k: v for k, v in table.items() if k not in skip}
    required = [
        f.name
        for f in dataclasses.fields(cls)  # type: ignore[arg-type]
        if f.init and f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING
    ]
    missing = [k for k in required if k not in kwargs]
    if missing:
        raise RecipeError(f"{path}.{missing[0]}" if path else missing[0], "missing required key")
    try:
        return cls(**kwargs)
    except RecipeError as exc:
        key = f"{path}.{exc.key}" if exc.key and path else (exc.key or path)
        raise RecipeError(key, exc.reason) from None


def to_plain(obj: Any) -> Any:
    """A dataclass (or nesting of them) as plain dicts/lists for JSON/TOML."""
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        out = {}
        for f in dataclasses.fields(obj):
            out[f.name] = to_plain(getattr(obj, f.name))
        kind = getattr(type(obj), "kind", None)
        if isinstance(kind, str):
            out = {"kind": kind, **out}
        return out
    if isinstance(obj, (list, tuple)):
        return [to_plain(v) for v in obj]
    if isinstance(obj, dict):
        return {k: to_plain(v) for k, v in obj.items()}
    return obj


def parse_kind(kinds: Mapping[str, type[T]], table: Any, path: str, what: str) -> T:
    """Build the member of a family (sources, cleaning steps) that ``table["kind"]`` names."""
    names = ", ".join(repr(k) for k in kinds)
    if not isinstance(table, Mapping):
        raise RecipeError(path, f"expected a table, got {_show(table)}")
    if "kind" not in table:
        raise RecipeError(f"{path}.kind", f"missing; expected one of {names}")
    kind = table["kind"]
    if not isinstance(kind, str) or kind not in kinds:
        hint = difflib.get_close_matches(str(kind), list(kinds), n=1)
        extra = f" (did you mean {hint[0]!r}?)" if hint else ""
        raise RecipeError(f"{path}.kind", f"unknown {what} {_show(kind)}{extra}; expected one of {names}")
    return section(kinds[kind], table, path, skip=("kind",))
