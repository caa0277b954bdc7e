"""Errors raised by ergodex.

Every error a user can cause derives from :class:`ErgodexError`; the command line catches that one
class and exits with code 2 after printing the message on one line (a class may name another code
in ``exit_code``: :class:`ModelLimitError` is a model failure, exit 1). Subclasses also derive from the
matching built-in so that callers who expect ``ValueError`` or ``KeyError`` still catch them.
A message names the thing (file, row, column, parameter), the rule broken, the value received and
what to do.
"""

from __future__ import annotations


class ErgodexError(Exception):
    """Base class of every error ergodex raises on purpose."""


class DataError(ErgodexError, ValueError):
    """Input data (a file, an array, a Series) breaks a rule: non-finite, non-uniform time, …"""


class SettingsError(ErgodexError, ValueError):
    """A setting (constructor argument, TOML key, command-line option) is unknown or out of range."""


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
