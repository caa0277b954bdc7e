"""Maps between data space and model space, fitted on data and stored inside the model file.

A surrogate often lives in a space other than the raw data's: standardised variables, a few PCA
(POD) modes of a high-dimensional field, or time-delay coordinates of a partially observed system.
A :class:`Transform` is fitted on data, maps data to model space (:meth:`Transform.forward`) and
back (:meth:`Transform.inverse`), and serialises to plain JSON-able dictionaries
(:meth:`Transform.to_dict`, :func:`transform_from_dict`) so that a model file carries its own
transform. Floats are stored as JSON numbers, which Python writes in their shortest exact form,
so a transform survives the round trip bit for bit.

Kinds: :class:`Standardise`, :class:`PCA`, :class:`DelayEmbedding` and :class:`Chain`.

A new kind provides, in a subclass of :class:`Transform`:

1. a class attribute ``kind`` (the name stored in files) and an entry in :data:`TRANSFORMS`;
2. ``__init__`` storing settings only, and ``_fit(X)`` setting learned attributes ending in ``_``;
3. ``_forward(X)`` and ``_inverse(Z)`` on 2-D float arrays;
4. ``_output_names()`` and ``_state()`` / ``_from_state(d)`` for the dictionary form.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from ergodex.exceptions import DataError, ModelFileError, NotFittedError, SettingsError
from ergodex.series import Series

__all__ = [
    "Transform",
    "Standardise",
    "PCA",
    "DelayEmbedding",
    "Chain",
    "TRANSFORMS",
    "transform_from_dict",
    "transform_series",
]


def _as_2d(X: Any, what: str = "X") -> np.ndarray:
    arr = np.asarray(X, dtype=np.float64)
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2:
        raise DataError(f"{what} must be 2-D (n_samples, n_variables), got shape {arr.shape}")
    return arr


def _data_and_names(
    X: Any, names: Sequence[str] | None
) -> tuple[list[np.ndarray], tuple[str, ...]]:
    """Runs (list of 2-D arrays) and names from a Series or an array."""
    if isinstance(X, Series):
        return list(X.runs), tuple(X.names)
    arr = _as_2d(X)
    if names is None:
        names = tuple(f"x{i + 1}" for i in range(arr.shape[1]))
    names = tuple(names)
    if len(names) != arr.shape[1]:
        raise DataError(f"names has {len(names)} entries, X has {arr.shape[1]} columns")
    return [arr], names


def _floats(value: Any, field: str, shape: tuple[int, ...] | None = None) -> np.ndarray:
    try:
        arr = np.array(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise ModelFileError(f"transform field {field!r} must be numbers") from None
    if shape is not None and arr.shape != shape:
        raise ModelFileError(f"transform field {field!r} has shape {arr.shape}, expected {shape}")
    if not np.all(np.isfinite(arr)):
        raise ModelFileError(f"transform field {field!r} has non-finite values")
    return arr


class Transform:
    """Base class: a fitted map between data space and model space.

    Settings go to the constructor; :meth:`fit` learns from data and returns ``self``; learned
    state lives in attributes ending in ``_``.
    """

    kind = ""

    def __init__(self) -> None:
        self.input_names_: tuple[str, ...] | None = None

    # -- public API ------------------------------------------------------------------------------
    def fit(self, X: Any, *, names: Sequence[str] | None = None) -> Transform:
        """Learn the transform from ``X``: a Series (runs and names) or an array (n_samples, n).

        For a Series every run is used; a delay embedding never spans two runs.
        """
        self._check_settings()
        runs, names = _data_and_names(X, names)
        self._fit_runs(runs)
        self.input_names_ = tuple(names)
        return self

    def forward(self, X: Any) -> np.ndarray:
        """Data space (n_samples, n_inputs) -> model space (n_rows, n_outputs)."""
        self._require_fitted()
        arr = _as_2d(X)
        if arr.shape[1] != self.n_inputs:
            raise DataError(
                f"{self.kind} transform expects {self.n_inputs} columns, got {arr.shape[1]}"
            )
        return self._forward(arr)

    def inverse(self, Z: Any) -> np.ndarray:
        """Model space (n_rows, n_outputs) -> data space (n_rows, n_inputs)."""
        self._require_fitted()
        arr = _as_2d(Z)
        if arr.shape[1] != self.n_outputs:
            raise DataError(
                f"{self.kind} transform inverse expects {self.n_outputs} columns, "
                f"got {arr.shape[1]}"
            )
        return self._inverse(arr)

    @property
    def input_names(self) -> tuple[str, ...]:
        """Data-space variable names (after fit)."""
        self._require_fitted()
        return self.input_names_  # type: ignore[return-value]

    @property
    def output_names(self) -> tuple[str, ...]:
        """Model-space variable names (after fit)."""
        self._require_fitted()
        return self._output_names()

    @property
    def n_inputs(self) -> int:
        return len(self.input_names)

    @property
    def n_outputs(self) -> int:
        return len(self.output_names)

    @property
    def rows_lost(self) -> int:
        """Rows at the start of each run that :meth:`forward` drops (delay embeddings)."""
        return 0

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able dictionary (lists of floats) holding settings and learned state."""
        self._require_fitted()
        return {"kind": self.kind, "input_names": list(self.input_names), **self._state()}

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self._settings_repr()})"

    # -- for subclasses ----------------------------------------------------------------------------
    def _require_fitted(self) -> None:
        if getattr(self, "input_names_", None) is None:
            raise NotFittedError(f"this {self.kind} transform is not fitted; call fit first")

    def _check_settings(self) -> None:
        pass

    def _settings_repr(self) -> str:
        return ""

    def _fit_runs(self, runs: list[np.ndarray]) -> None:
        self._fit(np.concatenate(runs, axis=0))

    def _fit(self, X: np.ndarray) -> None:  # pragma: no cover - abstract
        raise NotImplementedError

    def _forward(self, X: np.ndarray) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def _inverse(self, Z: np.ndarray) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def _output_names(self) -> tuple[str, ...]:
        return self.input_names

    def _state(self) -> dict[str, Any]:  # pragma: no cover - abstract
        raise NotImplementedError

    @classmethod
    def _from_state(cls, d: Mapping[str, Any], n_inputs: int) -> Transform:  # pragma: no cover
        raise NotImplementedError


class Standardise(Transform):
    """Centre each variable on its mean and divide by its standard deviation (ddof=0).

    Parameters
    ----------
    with_mean : bool, default True
    with_scale : bool, default True
    """

    kind = "standardise"

    def __init__(self, *, with_mean: bool = True, with_scale: bool = True) -> None:
        super().__init__()
        self.with_mean = with_mean
        self.with_scale = with_scale

    def _check_settings(self) -> None:
        for key in ("with_mean", "with_scale"):
            if not isinstance(getattr(self, key), bool):
                raise SettingsError(f"{key} must be True or False, got {getattr(self, key)!r}")

    def _settings_repr(self) -> str:
        return f"with_mean={self.with_mean}, with_scale={self.with_scale}"

    def _fit(self, X: np.ndarray) -> None:
        self.mean_ = X.mean(axis=0) if self.with_mean else np.zeros(X.shape[1])
        if self.with_scale:
            scale = X.std(axis=0)
            zero = np.flatnonzero(scale == 0)
            if zero.size:
                raise DataError(f"column {int(zero[0]) + 1} is constant; it cannot be standardised")
            self.scale_ = scale
        else:
            self.scale_ = np.ones(X.shape[1])

    def _forward(self, X: np.ndarray) -> np.ndarray:
        return (X - self.mean_) / self.scale_

    def _inverse(self, Z: np.ndarray) -> np.ndarray:
        return Z * self.scale_ + self.mean_

    def _state(self) -> dict[str, Any]:
        return {
            "with_mean": self.with_mean,
            "with_scale": self.with_scale,
            "mean": self.mean_.tolist(),
            "scale": self.scale_.tolist(),
        }

    @classmethod
    def _from_state(cls, d: Mapping[str, Any], n_inputs: int) -> Standardise:
        t = cls(
            with_mean=bool(d.get("with_mean", True)), with_scale=bool(d.get("with_scale", True))
        )
        t.mean_ = _floats(d["mean"], "mean", (n_inputs,))
        t.scale_ = _floats(d["scale"], "scale", (n_inputs,))
        if np.any(t.scale_ <= 0):
            raise ModelFileError("transform field 'scale' must be positive")
        return t


class PCA(Transform):
    """Principal component analysis (proper orthogonal decomposition) to a few modes.

    Model-space coordinates are the projections of the centred data on the leading principal
    axes: ``z = (x - mean) V^T``; the inverse is ``x = z V + mean``. The share of variance lost by
    the round trip equals one minus the kept share.

    Parameters
    ----------
    n_modes : int, optional
        Number of modes to keep.
    variance_fraction : float, optional
        Keep the fewest modes whose explained variance reaches this share of the total (0 < f <= 1).
        Give exactly one of ``n_modes`` and ``variance_fraction``.

    Attributes
    ----------
    mean_ : ndarray (n_inputs,)
    components_ : ndarray (n_modes, n_inputs)
        Orthonormal principal axes (rows), as computed by scikit-learn.
    explained_variance_ : ndarray (n_modes,)
    explained_variance_ratio_ : ndarray (n_modes,)
        Share of total variance of each kept mode.
    n_modes_ : int

    References
    ----------
    .. [1] I. T. Jolliffe, Principal Component Analysis, 2nd ed., Springer (2002).
    .. [2] P. Holmes, J. L. Lumley and G. Berkooz, Turbulence, Coherent Structures, Dynamical
       Systems and Symmetry, Cambridge University Press (1996) -- proper orthogonal decomposition.
    """

    kind = "pca"

    def __init__(
        self, n_modes: int | None = None, *, variance_fraction: float | None = None
    ) -> None:
        super().__init__()
        self.n_modes = n_modes
        self.variance_fraction = variance_fraction

    def _check_settings(self) -> None:
        if (self.n_modes is None) == (self.variance_fraction is None):
            raise SettingsError("give exactly one of n_modes and variance_fraction")
        if self.n_modes is not None and (
            isinstance(self.n_modes, bool)
            or not isinstance(self.n_modes, (int, np.integer))
            or self.n_modes < 1
        ):
            raise SettingsError(f"n_modes must be an integer >= 1, got {self.n_modes!r}")
        if self.variance_fraction is not None and not (
            isinstance(self.variance_fraction, (int, float))
            and not isinstance(self.variance_fraction, bool)
            and 0 < self.variance_fraction <= 1
        ):
            raise SettingsError(
                f"variance_fraction must be a number in (0, 1], got {self.variance_fraction!r}"
            )

    def _settings_repr(self) -> str:
        return f"n_modes={self.n_modes}, variance_fraction={self.variance_fraction}"

    def _fit(self, X: np.ndarray) -> None:
        from sklearn.decomposition import PCA as _SkPCA

        n, d = X.shape
        if self.n_modes is not None and self.n_modes > min(n, d):
            raise SettingsError(
                f"n_modes={self.n_modes} exceeds min(n_samples, n_variables) = {min(n, d)}"
            )
        # Full SVD: deterministic (no random solver), and all ratios known for the choice of k.
        full = _SkPCA(svd_solver="full").fit(X)
        ratio = full.explained_variance_ratio_
        if self.n_modes is not None:
            k = int(self.n_modes)
        else:
            cumulative = np.cumsum(ratio)
            assert self.variance_fraction is not None  # exactly one of the two is set (checked)
            # 1e-12 guards against the last cumulative sum landing a rounding error below 1.
            k = int(np.searchsorted(cumulative, self.variance_fraction - 1e-12) + 1)
            k = min(k, ratio.size)
        self.n_modes_ = k
        self.mean_ = np.array(full.mean_, dtype=np.float64)
        self.components_ = np.array(full.components_[:k], dtype=np.float64)
        self.explained_variance_ = np.array(full.explained_variance_[:k], dtype=np.float64)
        self.explained_variance_ratio_ = np.array(ratio[:k], dtype=np.float64)

    def _forward(self, X: np.ndarray) -> np.ndarray:
        return (X - self.mean_) @ self.components_.T

    def _inverse(self, Z: np.ndarray) -> np.ndarray:
        return Z @ self.components_ + self.mean_

    def _output_names(self) -> tuple[str, ...]:
        return tuple(f"mode_{i + 1}" for i in range(self.n_modes_))

    def _state(self) -> dict[str, Any]:
        return {
            "n_modes": None if self.n_modes is None else int(self.n_modes),
            "variance_fraction": self.variance_fraction,
            "mean": self.mean_.tolist(),
            "components": self.components_.tolist(),
            "explained_variance": self.explained_variance_.tolist(),
            "explained_variance_ratio": self.explained_variance_ratio_.tolist(),
        }

    @classmethod
    def _from_state(cls, d: Mapping[str, Any], n_inputs: int) -> PCA:
        t = cls(d.get("n_modes"), variance_fraction=d.get("variance_fraction"))
        components = _floats(d["components"], "components")
        if components.ndim != 2 or components.shape[1] != n_inputs or components.shape[0] < 1:
            raise ModelFileError(
                f"transform field 'components' has shape {components.shape}, expected "
                f"(n_modes, {n_inputs})"
            )
        k = components.shape[0]
        t.components_ = components
        t.n_modes_ = k
        t.mean_ = _floats(d["mean"], "mean", (n_inputs,))
        t.explained_variance_ = _floats(d["explained_variance"], "explained_variance", (k,))
        t.explained_variance_ratio_ = _floats(
            d["explained_variance_ratio"], "explained_variance_ratio", (k,)
        )
        return t


class DelayEmbedding(Transform):
    """Time-delay coordinates ``[x(t), x(t - tau), ..., x(t - (m-1) tau)]`` of each variable.

    For a partially observed system the delayed copies of the observed variables stand in for the
    unobserved ones (Takens' theorem). :meth:`forward` takes one contiguous trajectory sampled at
    the data's ``dt`` and drops its first ``(m - 1) * delay`` rows, which have no full history;
    :meth:`inverse` returns the undelayed block, so ``inverse(forward(X)) == X[(m-1)*delay:]``
    exactly. Use :func:`transform_series` to embed each run of a Series separately.

    Parameters
    ----------
    n_delays : int, default 2
        Number of copies ``m`` (1 means no embedding).
    delay : int, default 1
        Lag ``tau`` between copies, in samples.

    References
    ----------
    .. [1] F. Takens, "Detecting strange attractors in turbulence", in Dynamical Systems and
       Turbulence, Lecture Notes in Mathematics 898, Springer (1981), 366-381.
    .. [2] N. H. Packard, J. P. Crutchfield, J. D. Farmer and R. S. Shaw, "Geometry from a time
       series", Phys. Rev. Lett. 45, 712 (1980).
    """

    kind = "delay"

    def __init__(self, n_delays: int = 2, *, delay: int = 1) -> None:
        super().__init__()
        self.n_delays = n_delays
        self.delay = delay

    def _check_settings(self) -> None:
        for key in ("n_delays", "delay"):
            v = getattr(self, key)
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 1:
                raise SettingsError(f"{key} must be an integer >= 1, got {v!r}")

    def _settings_repr(self) -> str:
        return f"n_delays={self.n_delays}, delay={self.delay}"

    @property
    def rows_lost(self) -> int:
        return (int(self.n_delays) - 1) * int(self.delay)

    def _fit_runs(self, runs: list[np.ndarray]) -> None:
        short = [r.shape[0] for r in runs if r.shape[0] <= self.rows_lost]
        if short:
            raise DataError(
                f"a run of {short[0]} samples is too short for {self.n_delays} delays of "
                f"{self.delay} samples (needs more than {self.rows_lost})"
            )

    def _forward(self, X: np.ndarray) -> np.ndarray:
        lost = self.rows_lost
        n = X.shape[0] - lost
        if n < 1:
            raise DataError(
                f"{X.shape[0]} rows are too few for {self.n_delays} delays of {self.delay} samples"
            )
        starts = [lost - j * self.delay for j in range(self.n_delays)]
        blocks = [X[s : s + n] for s in starts]
        return np.concatenate(blocks, axis=1)

    def _inverse(self, Z: np.ndarray) -> np.ndarray:
        return Z[:, : self.n_inputs].copy()

    def _output_names(self) -> tuple[str, ...]:
        names = list(self.input_names)
        for j in range(1, self.n_delays):
            names += [f"{n}_lag{j * self.delay}" for n in self.input_names]
        return tuple(names)

    def _state(self) -> dict[str, Any]:
        return {"n_delays": int(self.n_delays), "delay": int(self.delay)}

    @classmethod
    def _from_state(cls, d: Mapping[str, Any], n_inputs: int) -> DelayEmbedding:
        t = cls(d["n_delays"], delay=d["delay"])
        try:
            t._check_settings()
        except SettingsError as exc:
            raise ModelFileError(str(exc)) from None
        return t


class Chain(Transform):
    """Apply transforms in order (e.g. standardise, then PCA); the inverse runs backwards.

    Parameters
    ----------
    steps : sequence of Transform
    """

    kind = "chain"

    def __init__(self, steps: Sequence[Transform]) -> None:
        super().__init__()
        self.steps = list(steps)

    def _check_settings(self) -> None:
        if not self.steps or not all(isinstance(s, Transform) for s in self.steps):
            raise SettingsError("steps must be a non-empty list of transforms")
        for s in self.steps:
            s._check_settings()

    def _settings_repr(self) -> str:
        return "[" + ", ".join(map(repr, self.steps)) + "]"

    def fit(self, X: Any, *, names: Sequence[str] | None = None) -> Chain:
        self._check_settings()
        runs, names = _data_and_names(X, names)
        current_runs, current_names = runs, names
        for step in self.steps:
            step._fit_runs(current_runs)
            step.input_names_ = tuple(current_names)
            current_runs = [step._forward(r) for r in current_runs]
            current_names = step.output_names
        self.input_names_ = tuple(names)
        return self

    @property
    def rows_lost(self) -> int:
        return sum(s.rows_lost for s in self.steps)

    def _forward(self, X: np.ndarray) -> np.ndarray:
        for step in self.steps:
            X = step.forward(X)
        return X

    def _inverse(self, Z: np.ndarray) -> np.ndarray:
        for step in reversed(self.steps):
            Z = step.inverse(Z)
        return Z

    def _output_names(self) -> tuple[str, ...]:
        return self.steps[-1].output_names

    def _state(self) -> dict[str, Any]:
        return {"steps": [s.to_dict() for s in self.steps]}

    @classmethod
    def _from_state(cls, d: Mapping[str, Any], n_inputs: int) -> Chain:
        steps_raw = d["steps"]
        if not isinstance(steps_raw, list) or not steps_raw:
            raise ModelFileError("transform field 'steps' must be a non-empty list")
        steps = [transform_from_dict(s) for s in steps_raw]
        if steps[0].n_inputs != n_inputs:
            raise ModelFileError("the first step's inputs differ from the chain's")
        for a, b in zip(steps, steps[1:]):
            if a.output_names != b.input_names:
                raise ModelFileError(
                    f"chain step {b.kind!r} expects inputs {list(b.input_names)}, the step before "
                    f"gives {list(a.output_names)}"
                )
        return cls(steps)


#: Kind name -> class.
TRANSFORMS: dict[str, type[Transform]] = {
    "standardise": Standardise,
    "pca": PCA,
    "delay": DelayEmbedding,
    "chain": Chain,
}


#: Kinds defined in modules that build on this one, imported when a model file names them.
_ELSEWHERE: dict[str, tuple[str, str]] = {
    "field-modes": ("ergodex.fields.transform", "FieldModes"),
}


def transform_from_dict(d: Mapping[str, Any]) -> Transform:
    """Rebuild a fitted transform from :meth:`Transform.to_dict` output.

    Raises
    ------
    ModelFileError
        If the dictionary is malformed or of an unknown kind.
    """
    if not isinstance(d, Mapping):
        raise ModelFileError(f"a transform must be an object, got {type(d).__name__}")
    kind = d.get("kind")
    if kind in _ELSEWHERE and kind not in TRANSFORMS:
        import importlib

        module, name = _ELSEWHERE[kind]
        TRANSFORMS[kind] = getattr(importlib.import_module(module), name)
    if kind not in TRANSFORMS:
        raise ModelFileError(f"unknown transform kind {kind!r}; known: {', '.join(TRANSFORMS)}")
    names = d.get("input_names")
    if not isinstance(names, list) or not names or not all(isinstance(n, str) for n in names):
        raise ModelFileError("transform field 'input_names' must be a non-empty list of strings")
    try:
        t = TRANSFORMS[kind]._from_state(d, len(names))
    except KeyError as exc:
        raise ModelFileError(f"{kind} transform is missing field {exc}") from None
    if getattr(t, "input_names_", None) is None:  # a kind may rebuild its own (field points)
        t.input_names_ = tuple(names)
    return t


def transform_series(transform: Transform, series: Series) -> Series:
    """Apply a fitted transform to every run of a Series (model-space Series).

    Each run is transformed on its own, so a delay embedding never mixes two runs.
    """
    if tuple(series.names) != tuple(transform.input_names):
        raise DataError(
            f"{series.source or 'series'}: variables {list(series.names)} differ from the "
            f"transform's inputs {list(transform.input_names)}"
        )
    runs = [transform.forward(r) for r in series.runs]
    return Series.from_arrays(
        runs,
        transform.output_names,
        series.dt,
        run_labels=series.run_labels,
        source=series.source,
        time_unit=series.time_unit,
    )
