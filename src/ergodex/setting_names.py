"""Fit-setting names of ergodex's own, and the older names that files written before still use.

Until model format ``ergodex-model/2`` and fit-settings format ``ergodex-fit/2``, the sparse
fitter's settings carried the parameter names of the regression library it wraps. They now have
names of ergodex's own (the fitter still passes the values on to that library under its names).
Files of the old versions are still read, their keys mapped to the new names; a file of the new
version (or a settings table given directly) that uses an old name is refused with a message that
names the new one. This module imports nothing, so the model reader and ``--help`` can use it.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

__all__ = [
    "FIT_SETTINGS_FORMAT",
    "OLD_FIT_SETTINGS_FORMAT",
    "RENAMED_SETTINGS",
    "RENAMED_SELECT_KEYS",
    "old_setting_in",
    "old_names",
    "renamed_message",
    "upgrade_settings",
]

#: The version a fit-settings document (TOML ``--config``, a registry's ``fit-settings.json``)
#: may name in its top-level ``format`` key; a document without one is of this version, except a
#: settings record ergodex itself stored before the rename (read as the old version).
FIT_SETTINGS_FORMAT = "ergodex-fit/2"
#: The old version: its setting names are mapped to the new ones on reading.
OLD_FIT_SETTINGS_FORMAT = "ergodex-fit/1"

#: Per fit method: old setting name → new name.
RENAMED_SETTINGS: dict[str, dict[str, str]] = {
    "sparse": {
        "threshold": "prune_below",
        "optimizer": "regression",
        "library": "terms",
        "n_frequencies": "harmonics",
        "include_bias": "constant_term",
        "alpha": "ridge",
        "reg_weight_lam": "penalty_weight",
        "regularizer": "penalty",
        "max_iter": "iterations",
        "fd_order": "difference_order",
        "smoother_window": "smoothing_window",
        "smoother_polyorder": "smoothing_degree",
        "ensemble": "bootstrap",
        "n_models": "resamples",
        "inclusion_threshold": "keep_fraction",
        "trapping": "bounded_quadratic",
    },
}

#: Keys of a fit-settings document's ``[select]`` table: old name → new name.
RENAMED_SELECT_KEYS: dict[str, str] = {"thresholds": "prune_below"}


def old_setting_in(method: Any, settings: Mapping[str, Any]) -> tuple[str, str] | None:
    """The first old setting name in ``settings`` as ``(old, new)``, or None."""
    renamed = RENAMED_SETTINGS.get(method, {}) if isinstance(method, str) else {}
    for key in settings:
        if key in renamed:
            return key, renamed[key]
    return None


def renamed_message(where: str, old: str, new: str, *, version: str) -> str:
    """One line saying that ``old`` is now called ``new`` (``where`` names the file or table)."""
    return (
        f"{where}: key '{old}' is the old name of '{new}' (renamed in {version}); "
        f"write {new} instead"
    )


def old_names(method: Any, settings: Mapping[str, Any]) -> dict[str, Any]:
    """The inverse of :func:`upgrade_settings`: settings under the names the old version used
    (what model fingerprints are computed on, so that they do not change with the rename)."""
    renamed = RENAMED_SETTINGS.get(method, {}) if isinstance(method, str) else {}
    back = {new: old for old, new in renamed.items()}
    return {back.get(key, key): value for key, value in settings.items()}


def upgrade_settings(method: Any, settings: Mapping[str, Any]) -> dict[str, Any]:
    """Settings of an old-version file with every old name replaced by the new one.

    Keys that already have a new name, and keys of methods without renames, pass through. When a
    table holds both the old and the new name of one setting, the new one wins (it can only have
    been added by hand).
    """
    renamed = RENAMED_SETTINGS.get(method, {}) if isinstance(method, str) else {}
    out: dict[str, Any] = {}
    for key, value in settings.items():
        new = renamed.get(key)
        if new is None:
            out[key] = value
        elif new not in settings:
            out[new] = value
    return out
