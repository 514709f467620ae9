"""Constructor parameters: checked against one declarative table, then stored as given.

A class lists its keyword-only parameters in a table ``{name: Rule}`` and its
``__init__`` starts with ``set_params(self, TABLE, locals())``: each value is
checked, and a bad one raises ``ValueError`` naming the class, the field, what
it must be and the value.  ``True`` is an ``int`` to Python; the number rules
refuse it.
"""
from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class Rule:
    """What a parameter must be: a test, the words an error shows, and how a good value is stored."""

    test: Callable[[object], bool]
    what: str
    store: Callable[[object], object] = lambda value: value


def integer(low: int, high: int = 10**9) -> Rule:
    """An ``int`` (not a bool) in ``[low, high]``."""
    return Rule(lambda v: isinstance(v, int) and not isinstance(v, bool) and low <= v <= high,
                f"an integer in [{low}, {high}]")


def real(low: float, high: float) -> Rule:
    """A number (not a bool) in ``[low, high]``, stored as a float."""
    return Rule(lambda v: isinstance(v, (int, float)) and not isinstance(v, bool) and low <= v <= high,
                f"a number in [{low}, {high}]", float)


def positive() -> Rule:
    """A number (not a bool) above 0, stored as a float."""
    return Rule(lambda v: isinstance(v, (int, float)) and not isinstance(v, bool) and v > 0, "a number > 0", float)


def nonempty() -> Rule:
    """A non-empty ``str``."""
    return Rule(lambda v: isinstance(v, str) and v != "", "a non-empty string")


def flag() -> Rule:
    """``True`` or ``False``."""
    return Rule(lambda v: isinstance(v, bool), "true or false")


def one_of(choices) -> Rule:
    """One of ``choices``."""
    choices = tuple(choices)
    return Rule(lambda v: v in choices, f"one of {', '.join(map(str, choices))}")


def set_params(obj, table: Mapping[str, Rule], values: Mapping[str, object]) -> None:
    """Check every parameter of ``table`` in ``values`` (an ``__init__``'s ``locals()``) and store it on ``obj``.

    Examples
    --------
    >>> class Window:
    ...     def __init__(self, *, size=10):
    ...         set_params(self, {"size": integer(1, 100)}, locals())
    >>> Window(size=5).size
    5
    >>> Window(size=True)
    Traceback (most recent call last):
    ...
    ValueError: Window: size must be an integer in [1, 100], got True
    """
    owner = type(obj).__name__
    for name, rule in table.items():
        value = values[name]
        if not rule.test(value):
            raise ValueError(f"{owner}: {name} must be {rule.what}, got {value!r}")
        setattr(obj, name, rule.store(value))
