"""One place and one message shape for parameter checks.

"The 'window' parameter of find_analogs must be an integer >= 0. Got -5 instead."
"""

from __future__ import annotations

import numbers

from analogs.errors import AnalogsInputError


def _fail(name: str, owner: str, expected: str, value) -> None:
    raise AnalogsInputError(
        f"The {name!r} parameter of {owner} must be {expected}. Got {value!r} instead."
    )


def check_int(value, name: str, owner: str, *, min_value: int | None = None,
              max_value: int | None = None) -> int:
    """Return ``value`` as int, or raise with the standard message."""
    expected = "an integer"
    if min_value is not None:
        expected += f" >= {min_value}"
    if max_value is not None:
        expected += f" <= {max_value}" if min_value is None else f" and <= {max_value}"
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        _fail(name, owner, expected, value)
    if (min_value is not None and value < min_value) or (
        max_value is not None and value > max_value
    ):
        _fail(name, owner, expected, value)
    return int(value)


def check_float(value, name: str, owner: str, *, min_value: float | None = None,
                max_value: float | None = None, min_inclusive: bool = True,
                max_inclusive: bool = True) -> float:
    """Return ``value`` as float, or raise with the standard message."""
    parts = []
    if min_value is not None:
        parts.append(f"{'>=' if min_inclusive else '>'} {min_value}")
    if max_value is not None:
        parts.append(f"{'<=' if max_inclusive else '<'} {max_value}")
    expected = "a number" + (" " + " and ".join(parts) if parts else "")
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or value != value:
        _fail(name, owner, expected, value)
    value = float(value)
    too_low = min_value is not None and (
        value < min_value if min_inclusive else value <= min_value)
    too_high = max_value is not None and (
        value > max_value if max_inclusive else value >= max_value)
    if too_low or too_high:
        _fail(name, owner, expected, value)
    return value


def check_choice(value, name: str, owner: str, choices) -> str:
    """Return ``value`` if it is one of ``choices`` (strings), else raise."""
    if value not in choices:
        _fail(name, owner, "one of " + ", ".join(repr(c) for c in choices), value)
    return value
