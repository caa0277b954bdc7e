"""Tables of allowed settings, and the one function that checks values against them.

Every fitter declares its settings as a table of :class:`Rule` objects. The same table checks
constructor arguments (when ``fit`` runs), keys read from a TOML file and options from the
command line, so a bad value gets the same message whichever way it came in.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from numbers import Integral, Real
from typing import Any

from ergodex.exceptions import SettingsError

__all__ = ["Rule", "check_setting", "check_settings"]


@dataclass(frozen=True)
class Rule:
    """What one setting may hold.

    Parameters
    ----------
    kind : {"int", "float", "bool", "choice", "float-list", "str"}
        The type of value. ``"float-list"`` is a non-empty list of numbers.
    low, high : float, optional
        Bounds on numbers (or on every element of a list).
    low_open, high_open : bool
        Whether the bound itself is excluded.
    choices : tuple of str, optional
        Allowed values of a ``"choice"`` setting.
    allow_none : bool
        Whether ``None`` is accepted (meaning "choose from the data").
    help : str
        One line shown in error messages and in ``--help``.
    """

    kind: str
    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False
    choices: tuple[str, ...] = ()
    allow_none: bool = False
    help: str = ""

    def describe(self) -> str:
        """Say in words what the rule allows (used in error messages)."""
        if self.kind == "choice":
            text = "one of " + ", ".join(repr(c) for c in self.choices)
        elif self.kind in ("int", "float", "float-list"):
            noun = {"int": "an integer", "float": "a number", "float-list": "a list of numbers"}[
                self.kind
            ]
            parts = []
            if self.low is not None:
                parts.append(f"{'>' if self.low_open else '>='} {self.low:g}")
            if self.high is not None:
                parts.append(f"{'<' if self.high_open else '<='} {self.high:g}")
            text = noun + (" " + " and ".join(parts) if parts else "")
        elif self.kind == "bool":
            text = "true or false"
        else:
            text = "a string"
        if self.allow_none:
            text += " (or None to choose from the data)"
        return text


def _number_ok(rule: Rule, value: float) -> bool:
    if not math.isfinite(value):
        return False
    if rule.low is not None and (value < rule.low or (rule.low_open and value == rule.low)):
        return False
    if rule.high is not None and (value > rule.high or (rule.high_open and value == rule.high)):
        return False
    return True


def check_setting(owner: str, name: str, value: Any, rule: Rule) -> None:
    """Raise :class:`SettingsError` if ``value`` breaks ``rule``.

    Parameters
    ----------
    owner : str
        Who the setting belongs to (``"sparse"``), named in the message.
    name : str
        The setting's key, named in the message.
    value : object
        The value received.
    rule : Rule
        What is allowed.
    """
    if value is None:
        if rule.allow_none:
            return
        raise SettingsError(f"{owner} setting '{name}' must be {rule.describe()}; got None")
    ok = True
    if rule.kind == "int":
        ok = (
            isinstance(value, Integral)
            and not isinstance(value, bool)
            and _number_ok(rule, float(value))
        )
    elif rule.kind == "float":
        ok = (
            isinstance(value, Real)
            and not isinstance(value, bool)
            and _number_ok(rule, float(value))
        )
    elif rule.kind == "bool":
        ok = isinstance(value, bool)
    elif rule.kind == "choice":
        ok = isinstance(value, str) and value in rule.choices
    elif rule.kind == "str":
        ok = isinstance(value, str)
    elif rule.kind == "float-list":
        ok = (
            isinstance(value, (list, tuple))
            and len(value) > 0
            and all(
                isinstance(v, Real) and not isinstance(v, bool) and _number_ok(rule, float(v))
                for v in value
            )
        )
    else:  # pragma: no cover - a programming error in a table
        raise AssertionError(f"unknown rule kind {rule.kind!r}")
    if not ok:
        raise SettingsError(f"{owner} setting '{name}' must be {rule.describe()}; got {value!r}")


def check_settings(owner: str, values: Mapping[str, Any], table: Mapping[str, Rule]) -> None:
    """Check every key and value of ``values`` against ``table``.

    Unknown keys are named together with the list of allowed ones, so a typo is easy to fix.
    """
    for name, value in values.items():
        if name not in table:
            allowed = ", ".join(sorted(table))
            raise SettingsError(f"{owner} has no setting '{name}'; allowed settings: {allowed}")
        check_setting(owner, name, value, table[name])
