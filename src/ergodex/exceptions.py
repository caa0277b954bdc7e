"""Errors raised by ergodex.

Every error a user can cause derives from :class:`ErgodexError`; the command line catches that one
class and exits with code 2 after printing the message on one line (a class may name another code
in ``exit_code``: :class:`ModelLimitError` is a model failure, exit 1). Subclasses also derive from
the matching built-in so that callers who expect ``ValueError`` or ``KeyError`` still catch them.
A message names the thing (file, row, column, parameter), the rule broken, the value received and
what to do.
"""

from __future__ import annotations


class ErgodexError(Exception):
    """Base class of every error ergodex raises on purpose.

    Advice that names a way to call ergodex comes in two forms, so that each user reads their
    own: ``python_hint`` (a keyword argument, e.g. ``"(read with split_at_gaps=True)"``) ends
    ``str(exc)``, and ``cli_hint`` (an option, e.g. ``"(use --split-at-gaps)"``) ends
    :meth:`for_command_line`, which the command line prints instead.
    """

    def __init__(self, *args: object, python_hint: str = "", cli_hint: str = "") -> None:
        super().__init__(*args)
        self.python_hint = python_hint
        self.cli_hint = cli_hint

    def _with(self, hint: str) -> str:
        base = super().__str__()
        return f"{base} {hint}" if hint else base

    def __str__(self) -> str:
        return self._with(self.python_hint)

    def for_command_line(self) -> str:
        """The message with the command-line form of its advice (the Python form without one)."""
        return self._with(self.cli_hint or self.python_hint)


class DataError(ErgodexError, ValueError):
    """Input data (a file, an array, a Series) breaks a rule: non-finite, non-uniform time, …"""


class SettingsError(ErgodexError, ValueError):
    """A setting (constructor argument, TOML key, command-line option) is unknown or out of
    range."""


class ModelFileError(ErgodexError, ValueError):
    """A surrogate file (``model.json``) or scorecard file is malformed or of an unknown version."""


class NotFittedError(ErgodexError, AttributeError):
    """A fitter's learned state was asked for before ``fit`` ran."""


class RegistryError(ErgodexError):
    """A registry operation is not allowed (unknown name or version, forbidden status change, …)."""


class IntegrityError(RegistryError):
    """A stored artifact no longer matches the hash recorded when it was written."""


class ModelLimitError(ErgodexError, RuntimeError):
    """The surrogate cannot be integrated within the limits: too stiff for the substep floor, or
    over the wall-time budget. A finding about the model, not bad input: the command line exits
    with :attr:`exit_code` 1 ("the model failed"), not 2."""

    exit_code = 1


class OptionalDependencyError(ErgodexError, ImportError):
    """An optional extra is needed for this feature; the message says which one to install."""


def require(module: str, extra: str, feature: str):
    """Import an optional module or raise :class:`OptionalDependencyError` with an install hint."""
    import importlib

    try:
        return importlib.import_module(module)
    except ImportError as exc:  # pragma: no cover - depends on the environment
        raise OptionalDependencyError(
            f"{feature} needs the optional package '{module}'; install it with "
            f"pip install 'ergodex[{extra}]'"
        ) from exc


def one_line(message: object) -> str:
    """``message`` (an exception or a text) with its whitespace collapsed, so that it prints on
    one line whatever a library wrote; an exception without a message gives its class name, so
    the line is never empty."""
    text = " ".join(str(message).split())
    if not text and isinstance(message, BaseException):
        return type(message).__name__
    return text
