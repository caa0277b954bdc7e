"""Fitting in a reduced space: build the data → model-space transform and map the runs through it.

Kept apart so that every fitter that offers ``n_modes`` reduces the data the same way, through
:mod:`ergodex.transforms` (whose transforms are stored inside the model file).
"""

from __future__ import annotations

import numpy as np

from ergodex.exceptions import SettingsError

__all__ = ["fit_transform", "model_space_runs"]


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
    try:
        from ergodex import transforms
    except ImportError as exc:  # pragma: no cover - only while the module is being written
        raise SettingsError(f"n_modes/standardise need ergodex.transforms, which failed to import: {exc}") from None
    steps = []
    if standardise:
        steps.append(transforms.Standardise())
    if n_modes is not None:
        steps.append(transforms.PCA(n_modes=n_modes))
    transform = steps[0] if len(steps) == 1 else transforms.Chain(steps)
    transform.fit(series)
    return transform


def model_space_runs(series, transform) -> tuple[list[np.ndarray], tuple[str, ...]]:
    """The runs in model space and the model-space variable names."""
    if transform is None:
        return [np.asarray(r, dtype=float) for r in series.runs], tuple(series.names)
    runs = [np.asarray(transform.forward(np.asarray(r, dtype=float)), dtype=float) for r in series.runs]
    return runs, tuple(transform.output_names)
