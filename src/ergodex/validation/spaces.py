"""Which variables a check compares, in which space, and in which column order."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from ergodex.exceptions import DataError


def _observed_variables(surrogate) -> list[str]:
    """:attr:`Surrogate.observed_variables`, refused when it names variables the model lacks.

    The rest of the model's variables are hidden (unobserved) states, e.g. the memory level of
    empirical model reduction (Kravtsov, Kondrashov & Ghil 2005).
    """
    observed = list(surrogate.observed_variables)
    unknown = [v for v in observed if v not in surrogate.variables]
    if unknown:
        raise DataError(
            f"the model's settings list observed variables {unknown} that it does not have "
            f"(variables: {list(surrogate.variables)})"
        )
    return observed


def _compared_space(surrogate, reference, observed):
    """The reference in the space the check compares in, and whether that is the model space.

    A surrogate whose transform changes the variables (PCA modes, a delay embedding) claims the
    statistics of its model variables only: a reduced model cannot hold the variance its
    transform leaves out, so comparing in data space would fail even the exact dynamics of the
    kept modes. The reference is then mapped, run by run, through the surrogate's own stored
    transform and compared there. A transform that keeps the variables (standardising) changes
    no ratio, and the check stays in data space.
    """
    transform = surrogate.transform
    if transform is not None:
        reference = align_columns(surrogate, reference)  # the same variables in any order
    if transform is None or tuple(transform.output_names) == tuple(reference.names):
        return reference, False
    from ergodex.model_space import transform_series
    from ergodex.series import Series

    mapped = transform_series(transform, reference)
    if observed != list(mapped.names):
        mapped = Series.from_arrays(
            [run[:, [mapped.names.index(v) for v in observed]] for run in mapped.runs],
            observed,
            mapped.dt,
            run_labels=mapped.run_labels,
            source=mapped.source,
            time_unit=mapped.time_unit,
        )
    return mapped, True


def _data_space_names(surrogate, reference, observed) -> np.ndarray | None:
    """Column order mapping model output (data space) onto the reference's variables.

    Without a transform, the model's data space is its ``observed`` variables (in that order);
    they must be the reference's variables, in any order.
    """
    if surrogate.transform is None:
        return _column_order(observed, reference)[1]
    return None


def _column_order(names, series) -> tuple[list[int], np.ndarray]:
    """Where each of ``names`` is in ``series`` and back: the one column matcher.

    Returns ``(take, back)``: ``series`` columns ``take`` are ``names`` in order, and ``back``
    maps ``names`` order onto the series' columns. The same set of names in any order is
    accepted; another set raises :class:`DataError`.
    """
    names = list(names)
    if sorted(names) != sorted(series.names):
        raise DataError(
            f"{series.source or 'reference data'}: variables {list(series.names)} do not "
            f"match the model's {names}; check the data file or the model"
        )
    return [series.names.index(n) for n in names], np.array([names.index(n) for n in series.names])


def data_variables(surrogate) -> tuple[str, ...]:
    """Names of the data columns a surrogate reads: its transform's inputs, else its observed
    variables (hidden variables have no data)."""
    if surrogate.transform is not None:
        return tuple(surrogate.transform.input_names)
    return tuple(_observed_variables(surrogate))


def align_columns(surrogate, series):
    """``series`` with its columns in the surrogate's data order (:func:`data_variables`).

    Data files may list the same variables in another order; :func:`check` accepts that, and
    every other path that hands data to a model (retraining, simulation start states, a
    transform) goes through here to accept it the same way. Another set of variables raises
    :class:`DataError`.
    """
    names = data_variables(surrogate)
    if tuple(series.names) == names:
        return series
    take = _column_order(names, series)[0]
    from ergodex.series import Series

    return Series.from_arrays(
        [run[:, take] for run in series.runs],
        names,
        series.dt,
        units=None if series.units is None else [series.units[j] for j in take],
        run_labels=series.run_labels,
        source=series.source,
        time_unit=series.time_unit,
    )


@dataclass(frozen=True)
class ComparedSpace:
    """The reference as the check compares it, and the maps between data and model states.

    ``to_model`` takes reference-column states to the model's variables, ``to_data`` takes
    model output back to data space; ``order`` (None in model space or with a transform) puts
    the model's observed columns in the reference's order.
    """

    reference: Any  # ergodex.series.Series
    observed: list[str]
    in_model_space: bool
    order: np.ndarray | None
    to_model: Callable[[np.ndarray], np.ndarray]
    to_data: Callable[[np.ndarray], np.ndarray]


def compared_space(surrogate, reference) -> ComparedSpace:
    """The space, variables and column order of a check of ``surrogate`` on ``reference``."""
    observed = _observed_variables(surrogate)
    reference, in_model_space = _compared_space(surrogate, reference, observed)
    order = None if in_model_space else _data_space_names(surrogate, reference, observed)
    if in_model_space:

        def to_model(x):
            return np.asarray(x, dtype=float)

        to_data = to_model
    elif order is None:
        to_model, to_data = surrogate.to_model_space, surrogate.to_data_space
    else:
        # reference columns -> the model's observed order (the inverse of ``order``)
        to_observed = np.argsort(order)

        def to_model(x):
            return surrogate.to_model_space(np.asarray(x, dtype=float)[:, to_observed])

        to_data = surrogate.to_data_space
    return ComparedSpace(reference, observed, in_model_space, order, to_model, to_data)
