"""The extension point every fitter implements, the name → class table, and fit-settings files.

A fitter turns a :class:`~ergodex.series.Series` into a :class:`~ergodex.surrogate.Surrogate`. The
shape follows scikit-learn: the constructor only stores settings, ``fit`` checks them against the
class's table of allowed values, learns, stores what it learned in attributes ending in ``_`` and
returns ``self``.
"""

from __future__ import annotations

import copy
import importlib
import logging
import os
import time
from collections.abc import Iterator, Mapping
from typing import Any, ClassVar

import numpy as np
from sklearn.base import BaseEstimator

from ergodex.exceptions import DataError, NotFittedError, SettingsError
from ergodex.fit_methods import FIT_METHODS
from ergodex.fitting.settings import Rule, check_settings
from ergodex.setting_names import (
    FIT_SETTINGS_FORMAT,
    OLD_FIT_SETTINGS_FORMAT,
    RENAMED_SELECT_KEYS,
    old_setting_in,
    renamed_message,
    upgrade_settings,
)

log = logging.getLogger(__name__)

__all__ = [
    "Fitter",
    "FITTERS",
    "make_fitter",
    "fitter_class",
    "check_fit_settings",
    "load_fit_settings",
    "parse_fit_settings",
    "read_fit_document",
    "current_fit_document",
    "data_provenance",
]


class Fitter(BaseEstimator):
    """Base class of every fitter: a scikit-learn estimator (``get_params(deep)``, ``set_params``,
    ``sklearn.base.clone``, ``check_is_fitted`` and the notebook display all work).

    An implementer provides:

    1. ``method``: a class attribute, the name under which :data:`FITTERS` lists the class
       (``"sparse"``); it is also recorded in the surrogate's settings.
    2. ``settings_table``: a class attribute mapping each constructor argument to a
       :class:`~ergodex.fitting.settings.Rule`. The constructor takes exactly these arguments,
       keyword-only, and only stores them under the same names (no checks, no conversion), so
       that :meth:`get_params` can read them back.
    3. ``_fit(self, series)``: the learning itself, called by :meth:`fit` after the settings and
       the series passed their checks. It must set ``surrogate_`` (a
       :class:`~ergodex.surrogate.Surrogate`) and ``score_`` (a float: the tendency fit's R², or
       the method's own goodness of fit), may set further diagnostics in attributes ending in
       ``_``, must not change any setting, and raises :class:`~ergodex.exceptions.DataError`
       (with the fix in the message) when the data cannot support the fit.
    4. Optionally ``_check_consistency(self)``: checks that involve several settings at once,
       raising :class:`~ergodex.exceptions.SettingsError`.
    5. A numpydoc docstring with a References section naming the published method.
    6. Optionally ``fit_stages``: the names of the substeps ``_fit`` announces with
       :meth:`_stage` (logged, and counted by ``progress``).

    Reading a learned attribute (a name ending in ``_``) before ``fit`` raises
    :class:`~ergodex.exceptions.NotFittedError`.
    """

    method: ClassVar[str] = ""
    settings_table: ClassVar[dict[str, Rule]] = {}
    fit_stages: ClassVar[tuple[str, ...]] = ()

    # -- settings ---------------------------------------------------------------------------
    # get_params(deep=True) comes from scikit-learn's BaseEstimator: the settings as a new dict
    # holding the stored objects themselves (clone checks that identity).

    def set_params(self, **settings: Any) -> Fitter:
        """Change settings (checked at once against the table) and return ``self``."""
        check_settings(self.method, settings, self.settings_table)
        for name, value in settings.items():
            setattr(self, name, value)
        return self

    def check_params(self) -> None:
        """Check every setting against the class's table; raise :class:`SettingsError` if one
        is bad."""
        check_settings(self.method, self.get_params(), self.settings_table)
        self._check_consistency()

    def _check_consistency(self) -> None:
        """Checks that involve several settings at once (overridden where needed)."""

    # -- fitting ----------------------------------------------------------------------------
    def fit(self, data, y=None, *, dt: float | None = None, progress=False) -> Fitter:
        """Learn a surrogate from every run of ``data`` and return ``self``.

        Parameters
        ----------
        data : Series, pandas.DataFrame or xarray.Dataset/DataArray
            One or more runs of the same variables, sampled every ``dt`` (converted by
            :func:`ergodex.frames.as_series`).
        y : None
            Unused; present so that scikit-learn tools may call ``fit(X, y)``.
        dt : float, optional
            Sampling interval when ``data`` is a table without times.
        progress : bool or callable(done, total)
            Progress of the fit's substeps (see :mod:`ergodex.progress`).

        Returns
        -------
        self
        """
        from ergodex.frames import as_series
        from ergodex.progress import reporter

        series = as_series(data, dt=dt, what="fit data")
        self.check_params()
        check_series(series)
        before = copy.deepcopy(self.get_params(deep=False))
        total = len(self.fit_stages) + 1
        log.info(
            "fit %s: %d runs, %d samples of %d variables (%s), dt=%g",
            self.method,
            series.n_runs,
            series.n_samples,
            series.n_variables,
            ", ".join(series.names),
            series.dt,
        )
        started = time.perf_counter()
        with reporter(progress, total, desc=f"fit {self.method}") as update:
            self._stage_state = [0, total, update]
            try:
                self._fit(series)
            finally:
                del self._stage_state
            if update is not None:
                update(total, total)
        # fit must leave every setting as it found it (scikit-learn's rule; a sweep relies on it)
        if not _same_params(before, self.get_params(deep=False)):  # a programming error
            raise RuntimeError(
                f"{type(self).__name__}._fit changed a setting; learned state belongs in "
                "attributes ending in '_'"
            )
        log.info(
            "fit %s done in %.2f s: %d terms, score %.4g",
            self.method,
            time.perf_counter() - started,
            getattr(self, "n_terms_", -1),
            self.score_,
        )
        return self

    def _stage(self, name: str) -> None:
        """Announce a substep of ``_fit``: logged, and counted by the fit's progress."""
        state = self.__dict__.get("_stage_state")
        log.info("fit %s: %s", self.method, name)
        if state is None:
            return
        state[0] = min(state[0] + 1, state[1] - 1)
        if state[2] is not None:
            state[2](state[0], state[1])

    def __sklearn_is_fitted__(self) -> bool:
        """What ``sklearn.utils.validation.check_is_fitted`` asks."""
        return self.is_fitted

    def _fit(self, series) -> None:  # pragma: no cover - the abstract hook
        raise NotImplementedError

    @property
    def is_fitted(self) -> bool:
        """Whether :meth:`fit` has completed."""
        return "surrogate_" in self.__dict__

    def __getattr__(self, name: str) -> Any:
        # Only called when normal lookup failed: a learned attribute asked for too early.
        if name.endswith("_") and not name.startswith("__"):
            raise NotFittedError(
                f"{type(self).__name__}.{name} is not available before fit(); "
                "call fit(series) first"
            )
        raise AttributeError(f"{type(self).__name__!r} object has no attribute {name!r}")

    # __repr__ and _repr_html_ come from BaseEstimator: only the settings that differ from the
    # defaults, so a repr stays one short line.


def _same_params(a: dict[str, Any], b: dict[str, Any]) -> bool:
    if a.keys() != b.keys():
        return False
    for key in a:
        x, y = a[key], b[key]
        if isinstance(x, np.ndarray) or isinstance(y, np.ndarray):
            if not np.array_equal(np.asarray(x), np.asarray(y)):
                return False
        elif x != y:
            return False
    return True


def check_series(series) -> None:
    """Check that ``series`` looks like a :class:`~ergodex.series.Series` a fitter can use.

    Raises
    ------
    DataError
        When it is not a Series, or a variable is constant over every run (a constant column
        makes the term library rank-deficient: drop the variable or add the runs in which it moves).
    """
    for attribute in ("runs", "names", "dt"):
        if not hasattr(series, attribute):
            raise DataError(
                f"fitters take an ergodex.series.Series; got {type(series).__name__} "
                f"(build one with Series.from_arrays(runs, names, dt))"
            )
    stacked = np.concatenate([np.asarray(r, dtype=float) for r in series.runs], axis=0)
    if not np.all(np.isfinite(stacked)):
        raise DataError(
            f"{_source(series)}: the data hold non-finite values; clean or split the runs first"
        )
    spread = np.ptp(stacked, axis=0)
    scale = np.maximum(np.abs(stacked).max(axis=0), 1.0)
    for j, name in enumerate(series.names):
        if spread[j] <= 1e-12 * scale[j]:
            raise DataError(
                f"{_source(series)}: variable '{name}' is constant ({stacked[0, j]:g}) over every "
                "run; it cannot be fitted: drop it from the data"
            )


def data_provenance(series, model_runs=None, model_names=None, **extra: Any) -> dict[str, Any]:
    """What every fitted surrogate records about its data: fingerprint, size, sampling interval,
    range.

    The interval lets ``ergodex simulate`` default its output step to the data's; its unit
    (``time_unit``, recorded when the data name it) is what every time and rate of the model is
    in, printed beside dt. The range of
    each model-space variable over the training runs (``model_runs``, named ``model_names``) lets
    ``ergodex simulate`` stop a member that leaves it far behind (see
    :func:`ergodex.integrate.blowup_bound`) when no reference states are given.
    """
    from ergodex import __version__

    record = {
        "data_fingerprint": series.fingerprint(),
        "fitted_on_runs": int(series.n_runs),
        "fitted_on_samples": int(series.n_samples),
        "dt": float(series.dt),
        "ergodex_version": __version__,
    }
    if getattr(series, "time_unit", None):
        record["time_unit"] = str(series.time_unit)
    if model_runs is not None:
        stacked = np.concatenate([np.asarray(r, dtype=np.float64) for r in model_runs])
        stacked = stacked[np.all(np.isfinite(stacked), axis=1)]
        if len(stacked):
            record["model_range"] = {
                str(name): [float(lo), float(hi)]
                for name, lo, hi in zip(model_names, stacked.min(axis=0), stacked.max(axis=0))
            }
    return {**record, **extra}


def _source(series) -> str:
    """How messages name the data: its file or folder, else "the data"."""
    return getattr(series, "source", "") or "the data"


# -- the name → class table ------------------------------------------------------------------
class _FitterTable(Mapping):
    """Method name → fitter class, imported on first use (pysindy and friends load lazily)."""

    _where: ClassVar[dict[str, tuple[str, str]]] = FIT_METHODS

    def __getitem__(self, name: str) -> type[Fitter]:
        module, attribute = self._where[name]
        return getattr(importlib.import_module(module), attribute)

    def __iter__(self) -> Iterator[str]:
        return iter(self._where)

    def __len__(self) -> int:
        return len(self._where)

    def __repr__(self) -> str:
        return f"FITTERS({', '.join(self._where)})"


FITTERS: Mapping[str, type[Fitter]] = _FitterTable()
"""Method name → fitter class: ``"sparse"``, ``"linear-inverse"``, ``"quadratic-noise"``,
``"calibrated-linear-inverse"``."""


def fitter_class(method: str | type[Fitter]) -> type[Fitter]:
    """Return the fitter class for a method name (or the class itself, passed through)."""
    if isinstance(method, type) and issubclass(method, Fitter):
        return method
    if not isinstance(method, str) or method not in FITTERS:
        raise SettingsError(f"unknown fit method {method!r}; allowed methods: {', '.join(FITTERS)}")
    return FITTERS[method]


def check_fit_settings(method: str | type[Fitter], settings: Mapping[str, Any]) -> None:
    """Check a method name and its settings without building anything; raise
    :class:`SettingsError`."""
    cls = fitter_class(method)
    if not isinstance(settings, Mapping):
        raise SettingsError(
            f"{cls.method} settings must be a table of key = value; got {type(settings).__name__}"
        )
    old = old_setting_in(cls.method, settings)
    if old is not None:
        raise SettingsError(
            renamed_message(f"{cls.method} settings", *old, version=FIT_SETTINGS_FORMAT)
        )
    check_settings(cls.method, settings, cls.settings_table)


def make_fitter(method: str | type[Fitter], settings: Mapping[str, Any] | None = None) -> Fitter:
    """Build a fitter from a method name (or class) and a dict of settings.

    Parameters
    ----------
    method : str or Fitter subclass
        A key of :data:`FITTERS`.
    settings : dict, optional
        Constructor arguments; unknown keys and bad values raise :class:`SettingsError` naming
        the key and listing what is allowed.

    Examples
    --------
    >>> fitter = make_fitter("linear-inverse", {"tau0": 0.5})
    >>> type(fitter).__name__, fitter.get_params()["tau0"]
    ('LinearInverseModel', 0.5)
    >>> make_fitter("sparse", {"prune_belo": 0.1})  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    ergodex.exceptions.SettingsError: sparse has no setting 'prune_belo'; allowed settings: ...
    """
    settings = dict(settings or {})
    check_fit_settings(method, settings)
    cls = fitter_class(method)
    fitter = cls(**settings)
    fitter.check_params()
    return fitter


# -- settings files --------------------------------------------------------------------------
_TOP_LEVEL_KEYS = ("format", "method", "settings", "select")


def current_fit_document(
    document: Mapping[str, Any], *, source: str = "fit settings", recorded: bool = False
) -> dict:
    """A fit-settings document in the current version's names, without its ``format`` key.

    ``format = "ergodex-fit/1"`` marks the old version: its setting names (in ``[settings]``,
    ``[select]`` and each ``[[select.candidates]]``) are mapped to the new ones. A document of
    the current version (``format = "ergodex-fit/2"``, or no ``format`` key) that uses an old
    name is refused, the message naming the key and its new name. ``recorded=True`` reads a
    document without a ``format`` key as the old version: settings ergodex stored itself (a
    registry's ``fit-settings`` file) before the version existed.
    """
    document = dict(document)
    version = document.pop("format", OLD_FIT_SETTINGS_FORMAT if recorded else FIT_SETTINGS_FORMAT)
    if version not in (FIT_SETTINGS_FORMAT, OLD_FIT_SETTINGS_FORMAT):
        raise SettingsError(
            f"{source}: key 'format' must be {FIT_SETTINGS_FORMAT!r} (or the older "
            f"{OLD_FIT_SETTINGS_FORMAT!r}); got {version!r}"
        )
    old = version == OLD_FIT_SETTINGS_FORMAT
    method = document.get("method", "sparse")
    if isinstance(document.get("settings"), Mapping):
        document["settings"] = _current_settings(
            method, document["settings"], old, f"{source}: [settings]"
        )
    select = document.get("select")
    if isinstance(select, Mapping):
        select = dict(select)
        for old_key, new_key in RENAMED_SELECT_KEYS.items():
            if old_key not in select:
                continue
            if not old:
                raise SettingsError(
                    renamed_message(
                        f"{source}: [select]", old_key, new_key, version=FIT_SETTINGS_FORMAT
                    )
                )
            select.setdefault(new_key, select.pop(old_key))
            select.pop(old_key, None)
        entries = select.get("candidates")
        if isinstance(entries, list):
            where = f"{source}: [[select.candidates]] entry"
            select["candidates"] = [
                _current_settings(entry.get("method"), entry, old, f"{where} {k + 1}")
                if isinstance(entry, Mapping)
                else entry
                for k, entry in enumerate(entries)
            ]
        document["select"] = select
    return document


def _current_settings(method: Any, settings: Mapping[str, Any], old: bool, where: str) -> dict:
    if old:
        return upgrade_settings(method, settings)
    found = old_setting_in(method, settings)
    if found is not None:
        raise SettingsError(renamed_message(where, *found, version=FIT_SETTINGS_FORMAT))
    return dict(settings)


def parse_fit_settings(
    document: Mapping[str, Any], *, source: str = "fit settings", recorded: bool = False
) -> tuple[str, dict]:
    """Validate a parsed fit-settings document and return ``(method, settings)``.

    The document holds ``method = "sparse"`` and a ``[settings]`` table, optionally a
    ``format`` key (see :func:`current_fit_document`, which also says what ``recorded`` does);
    a ``[select]`` table is left for :func:`ergodex.fitting.selection.parse_selection` to read.
    """
    for key in document:
        if key not in _TOP_LEVEL_KEYS:
            raise SettingsError(
                f"{source}: unknown key '{key}'; allowed top-level keys: "
                f"{', '.join(_TOP_LEVEL_KEYS)}"
            )
    document = current_fit_document(document, source=source, recorded=recorded)
    method = document.get("method", "sparse")
    if not isinstance(method, str) or method not in FITTERS:
        raise SettingsError(
            f"{source}: key 'method' must be one of {', '.join(FITTERS)}; got {method!r}"
        )
    settings = document.get("settings", {})
    if not isinstance(settings, Mapping):
        raise SettingsError(
            f"{source}: 'settings' must be a table ([settings]); got {type(settings).__name__}"
        )
    try:
        check_fit_settings(method, settings)
    except SettingsError as exc:
        raise SettingsError(f"{source}: [settings] {exc}") from None
    return method, dict(settings)


def load_fit_settings(path: str | os.PathLike, *, recorded: bool = False) -> tuple[str, dict]:
    """Read fit settings from a TOML file and return ``(method, settings)``.

    The file looks like::

        method = "sparse"

        [settings]
        degree = 2
        prune_below = 0.1

    An optional ``format = "ergodex-fit/1"`` line reads a file written with the old setting
    names (see :func:`current_fit_document`; ``recorded`` is passed on to it).

    Raises
    ------
    SettingsError
        When the file cannot be read or parsed (the message gives the line), or a key or value is
        not allowed (the message names the key and lists the allowed ones).
    """
    path = os.fspath(path)
    return parse_fit_settings(read_fit_document(path), source=path, recorded=recorded)


def read_fit_document(path: str | os.PathLike) -> dict:
    """Read a fit-settings TOML file into a dict (not yet validated; see
    :func:`parse_fit_settings`).

    Raises
    ------
    SettingsError
        When the file is missing, unreadable, or not valid TOML (the message gives the line).
    """
    from ergodex.limits import load_toml_file

    path = os.fspath(path)
    if not os.path.lexists(path):
        raise SettingsError(f"{path}: fit settings file not found")
    return load_toml_file(path, "a fit settings file (TOML)", error=SettingsError)
