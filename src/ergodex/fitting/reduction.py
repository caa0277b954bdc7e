"""Fitting in a reduced space: build the data → model-space transform and map the runs through it.

Kept apart so that every fitter that offers ``n_modes`` reduces the data the same way, through
:mod:`ergodex.model_space` (whose transforms are stored inside the model file).
"""

from __future__ import annotations

import numpy as np

from ergodex.exceptions import SettingsError

__all__ = ["cyclic_rotations", "fit_transform", "model_space_runs", "reduce_series"]


def reduce_series(series, *, method: str, n_modes: int | None, standardise: bool):
    """The shared start of every fitter: check ``n_modes``, fit the transform, map the runs.

    Returns ``(transform, runs, names)``: the fitted transform (None when none is asked), the runs
    in model space and the model-space variable names.
    """
    if n_modes is not None and n_modes > series.n_variables:
        raise SettingsError(
            f"{method} setting 'n_modes' = {n_modes} exceeds the {series.n_variables} variables"
        )
    transform = fit_transform(series, n_modes=n_modes, standardise=standardise)
    runs, names = model_space_runs(series, transform)
    return transform, runs, names


def fit_transform(series, *, n_modes: int | None, standardise: bool):
    """Fit the transform the settings ask for on all runs of ``series`` (None when none is asked).

    Parameters
    ----------
    series : Series
    n_modes : int or None
        Keep this many principal components; None keeps the variables.
    standardise : bool
        Scale to unit variance first (alone, or before the PCA).
    """
    if n_modes is None and not standardise:
        return None
    from ergodex import model_space

    steps: list[model_space.Transform] = []
    if standardise:
        steps.append(model_space.Standardise())
    if n_modes is not None:
        steps.append(model_space.PCA(n_modes=n_modes))
    transform = steps[0] if len(steps) == 1 else model_space.Chain(steps)
    transform.fit(series)
    return transform


def model_space_runs(series, transform) -> tuple[list[np.ndarray], tuple[str, ...]]:
    """The runs in model space and the model-space variable names."""
    if transform is None:
        return [np.asarray(r, dtype=float) for r in series.runs], tuple(series.names)
    runs = [
        np.asarray(transform.forward(np.asarray(r, dtype=float)), dtype=float) for r in series.runs
    ]
    return runs, tuple(transform.output_names)


def cyclic_rotations(series):
    """The runs of ``series`` plus copies with the variables rotated around a ring (n in all).

    For variables that are stations on a homogeneous ring (the same statistics under a cyclic
    shift, as for Lorenz-96), a rotated run is another sample of the same process. Fitted on all
    rotations, the covariance is circulant, so its principal components are exact Fourier pairs
    (Gray, R. M. (2006). Toeplitz and circulant matrices: a review, sec. 3.1), free of the
    sample-specific rotation PCA picks inside a near-degenerate wave pair.
    """
    from ergodex.series import Series

    n = series.n_variables
    runs = [
        np.roll(np.asarray(run, dtype=float), k, axis=1) for run in series.runs for k in range(n)
    ]
    return Series.from_arrays(runs, series.names, series.dt)
