"""One place and one message shape for parameter checks.

From the Python API the message names the parameter and the public function called:
"The 'window' parameter of find must be an integer >= 0 and <= 183. Got -5 instead."
From the command line it names the option: "--window must be an integer >= 0 and <= 183.
Got -5 instead." The option table (:mod:`analogs.parameters`) says what each check is;
these helpers carry it out. Imports nothing heavy: the CLI's parser is built from them.
"""

from __future__ import annotations

import contextlib
import numbers

from analogs.errors import AnalogsInputError


def subject(name: str, owner: str | None) -> str:
    """Who the message is about: a parameter of a function, or a command-line option.

    ``owner`` is the public function the user called (``"find"``); ``None`` when
    ``name`` is a command-line option (``"--window"``) or a value whose caller is not
    known (``"The 'region' option"``).
    """
    if owner is not None:
        return f"The {name!r} parameter of {owner}"
    if name.startswith("-"):
        return name
    return f"The {name!r} option"


class ParameterError(AnalogsInputError):
    """A value outside what a parameter accepts, in the one message shape.

    Keeps its parts (``name``, ``owner``, ``expected``, ``value``) so that the public
    function or the command line that passed the value can name itself instead
    (:meth:`renamed`).
    """

    def __init__(self, name: str, owner: str | None, expected: str, value):
        self.name, self.owner, self.expected, self.value = name, owner, expected, value
        super().__init__(f"{subject(name, owner)} must be {expected}. Got {value!r} instead.")

    def renamed(self, name: str, owner: str | None = None) -> "ParameterError":
        """The same complaint about parameter ``name`` of ``owner`` (or option ``name``)."""
        return ParameterError(name, owner, self.expected, self.value)


@contextlib.contextmanager
def renamed_errors(owner: str, *names: str):
    """Errors about parameters ``names`` raised inside name the public function ``owner``.

    For a value the public function passes on as it is, checked by a helper that needs
    the data to check it (a region against the store's grid, event kinds against its
    events table): ``with renamed_errors("find", "region", "kinds"):``.
    """
    try:
        yield
    except ParameterError as error:
        if error.name not in names:
            raise
        raise error.renamed(error.name, owner) from None


def fail(name: str, owner: str | None, expected: str, value):
    """Raise :class:`ParameterError` (see :func:`subject` for ``name`` and ``owner``)."""
    raise ParameterError(name, owner, expected, value)


def int_expected(min_value=None, max_value=None) -> str:
    """``"an integer >= 0 and <= 183"``: what :func:`check_int` asks for."""
    expected = "an integer"
    if min_value is not None:
        expected += f" >= {min_value}"
    if max_value is not None:
        expected += f" <= {max_value}" if min_value is None else f" and <= {max_value}"
    return expected


def float_expected(min_value=None, max_value=None, min_inclusive=True,
                   max_inclusive=True) -> str:
    """``"a number >= 0.0 and <= 1.0"``: what :func:`check_float` asks for."""
    parts = []
    if min_value is not None:
        parts.append(f"{'>=' if min_inclusive else '>'} {min_value}")
    if max_value is not None:
        parts.append(f"{'<=' if max_inclusive else '<'} {max_value}")
    return "a number" + (" " + " and ".join(parts) if parts else "")


def choice_expected(choices) -> str:
    """``"one of 'equal', 'gaussian'"``: what :func:`check_choice` asks for."""
    return "one of " + ", ".join(repr(c) for c in choices)


def check_int(value, name: str, owner: str | None, *, min_value: int | None = None,
              max_value: int | None = None) -> int:
    """Return ``value`` as int, or raise with the standard message."""
    if (isinstance(value, bool) or not isinstance(value, numbers.Integral)
            or (min_value is not None and value < min_value)
            or (max_value is not None and value > max_value)):
        fail(name, owner, int_expected(min_value, max_value), value)
    return int(value)


def check_float(value, name: str, owner: str | None, *, min_value: float | None = None,
                max_value: float | None = None, min_inclusive: bool = True,
                max_inclusive: bool = True) -> float:
    """Return ``value`` as float, or raise with the standard message."""
    expected = float_expected(min_value, max_value, min_inclusive, max_inclusive)
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or value != value:
        fail(name, owner, expected, value)
    value = float(value)
    too_low = min_value is not None and (
        value < min_value if min_inclusive else value <= min_value)
    too_high = max_value is not None and (
        value > max_value if max_inclusive else value >= max_value)
    if too_low or too_high:
        fail(name, owner, expected, value)
    return value


def check_box(value, name: str, owner: str | None) -> tuple:
    """(south, north, west, east) in degrees from text ``"S,N,W,E"`` or four numbers."""
    expected = ("four numbers S,N,W,E in degrees with -90 <= S < N <= 90 and W, E in "
                "[-180, 180]")
    try:
        parts = value.split(",") if isinstance(value, str) else list(value)
        south, north, west, east = (float(v) for v in parts)
    except (TypeError, ValueError):
        fail(name, owner, expected, value)
    if not (-90.0 <= south < north <= 90.0 and -180.0 <= west <= 180.0
            and -180.0 <= east <= 180.0):
        fail(name, owner, expected, value)
    return south, north, west, east


def check_choice(value, name: str, owner: str | None, choices) -> str:
    """Return ``value`` if it is one of ``choices`` (strings), else raise."""
    if value not in choices:
        fail(name, owner, choice_expected(choices), value)
    return value
