"""Glue between fields and surrogates: give a fitted model its reduction, and read it back.

A surrogate of a field is fitted on the mode amplitudes (any fitter), then carries the
:class:`~ergodex.fields.transform.FieldModes` transform in its model file, so ``simulate`` and the
grid checks can map its output back to the grid. The same goes for a delay embedding of a single
index (``--delays``): the surrogate lives in delay coordinates and carries the embedding.
"""

from __future__ import annotations

from typing import Any

from ergodex.exceptions import DataError
from ergodex.series import Series

__all__ = ["attach_transform", "delay_series", "field_transform_of"]


def attach_transform(surrogate, transform, **provenance: Any):
    """A copy of ``surrogate`` whose transform is ``transform`` (outputs = its variables)."""
    from ergodex.surrogate import Surrogate

    if tuple(transform.output_names) != tuple(surrogate.variables):
        raise DataError(
            f"the transform gives {list(transform.output_names)}, the model has "
            f"{list(surrogate.variables)}"
        )
    return Surrogate(
        surrogate.variables,
        surrogate.terms,
        surrogate.coefficients,
        kind=surrogate.kind,
        noise=surrogate.noise,
        transform=transform,
        settings=surrogate.settings,
        provenance={**surrogate.provenance, **provenance},
    )


def field_transform_of(surrogate):
    """The model's :class:`FieldModes` transform, or None for a model of plain columns."""
    from ergodex.fields.transform import FieldModes

    t = surrogate.transform
    return t if isinstance(t, FieldModes) else None


def delay_series(series: Series, n_delays: int, delay: int = 1):
    """Fit a delay embedding on ``series`` and map every run: ``(transform, embedded series)``."""
    from ergodex.model_space import DelayEmbedding, transform_series

    t = DelayEmbedding(n_delays, delay=delay).fit(series)
    return t, transform_series(t, series)
