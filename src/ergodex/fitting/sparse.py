"""Sparse nonlinear ODEs fitted through pysindy (SINDy), with ensembles and the weak form.

The fitter builds the regression ``Y ≈ Θ(X) Ξ`` itself from every run of a Series — pointwise
tendencies (finite differences, optionally smoothed) or weak-form integrals — and hands it to a
pysindy term library and optimizer. Doing the assembly here rather than inside ``pysindy.SINDy``
keeps three things under our control: several runs of any length, the weak form with a model that
can be integrated (pysindy's weak model cannot predict or simulate), and bagging with our own
seeded generator (pysindy's ensemble draws from numpy's global random state). The coefficients are
taken into ergodex's own term table; the pysindy objects are not kept.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ergodex.exceptions import DataError, OptionalDependencyError, SettingsError
from ergodex.fitting.base import Fitter, _source, data_provenance
from ergodex.fitting.reduction import reduce_series
from ergodex.fitting.settings import Rule
from ergodex.fitting.tendencies import (
    check_library_rank,
    evaluate_terms,
    r2_score,
    relative_tendency_error,
    term_names,
    terms_from_feature_names,
    weak_matrices,
)

__all__ = ["SparseODE", "sparse_settings_table"]

LIBRARIES = ("polynomial", "fourier", "polynomial+fourier")
OPTIMIZERS = ("stlsq", "sr3")
DIFFERENTIATIONS = ("finite-difference", "smoothed-finite-difference", "weak")

sparse_settings_table: dict[str, Rule] = {
    "degree": Rule("int", low=0, high=5, help="highest total degree of the polynomial terms"),
    "prune_below": Rule(
        "float", low=0.0, help="STLSQ: coefficients smaller than this are set to zero"
    ),
    "regression": Rule("choice", choices=OPTIMIZERS, help="sparse regression method"),
    "terms": Rule("choice", choices=LIBRARIES, help="candidate terms"),
    "harmonics": Rule(
        "int", low=1, high=20, help="Fourier terms: sin/cos of 1…n times each variable"
    ),
    "constant_term": Rule("bool", help="include the constant term"),
    "ridge": Rule("float", low=0.0, help="STLSQ: ridge weight of each least-squares step"),
    "penalty_weight": Rule("float", low=0.0, help="SR3: weight of the sparsity penalty"),
    "penalty": Rule("choice", choices=("L0", "L1"), help="SR3: penalty"),
    "iterations": Rule(
        "int", low=1, high=100000, allow_none=True, help="iterations of the sparse regression"
    ),
    "differentiation": Rule(
        "choice", choices=DIFFERENTIATIONS, help="how tendencies are estimated"
    ),
    "difference_order": Rule(
        "int", low=1, high=8, help="order of accuracy of the finite differences"
    ),
    "smoothing_window": Rule(
        "int", low=5, help="smoothed differences: Savitzky–Golay window (samples, odd)"
    ),
    "smoothing_degree": Rule(
        "int", low=1, high=7, help="smoothed differences: Savitzky–Golay degree"
    ),
    "weak_window": Rule("int", low=5, help="weak form: samples per test-function window"),
    "weak_stride": Rule(
        "int",
        low=1,
        allow_none=True,
        help="weak form: samples between windows (None: window/4, closer for large libraries)",
    ),
    "weak_degree": Rule("int", low=2, high=16, help="weak form: test function (1 - s^2)^p, this p"),
    "bootstrap": Rule(
        "bool", help="refit on resampled rows, keep terms by how often they are included"
    ),
    "resamples": Rule("int", low=2, high=10000, help="bootstrap: number of resampled fits"),
    "keep_fraction": Rule(
        "float",
        low=0.0,
        high=1.0,
        low_open=True,
        help="bootstrap: keep a term included in at least this fraction of the fits",
    ),
    "bounded_quadratic": Rule("bool", help="globally stable quadratic model (needs cvxpy)"),
    "seed": Rule("int", low=0, help="seed of the bootstrap's resampling"),
    "n_modes": Rule(
        "int", low=1, allow_none=True, help="principal components kept (None: all variables)"
    ),
    "standardise": Rule("bool", help="unit variance (before PCA)"),
}


class SparseODE(Fitter):
    """Sparse identification of nonlinear dynamics (SINDy): a few terms out of a large library.

    Tendencies ``dx/dt`` (or their weak-form integrals) are regressed on a library of candidate
    terms (monomials up to ``degree``, optionally sin/cos), and a sparsity-promoting optimizer
    keeps only the terms the data need. All runs of the Series are fitted at once.

    Parameters
    ----------
    degree : int, default 2
        Highest total degree of the polynomial terms.
    prune_below : float, default 0.1
        STLSQ threshold: coefficients of smaller magnitude are removed (in the data's units).
    regression : {"stlsq", "sr3"}, default "stlsq"
        Sequentially thresholded least squares, or sparse relaxed regularised regression.
    terms : {"polynomial", "fourier", "polynomial+fourier"}, default "polynomial"
    harmonics : int, default 1
        Fourier terms sin(k x), cos(k x) for k = 1 … harmonics.
    constant_term : bool, default True
        Include the constant term.
    ridge : float, default 0.05
        STLSQ ridge weight (pysindy's default; negligible against thousands of samples).
    penalty_weight : float, default 0.005
        SR3 penalty weight (with L0 the effective threshold is sqrt(2 λ)).
    penalty : {"L0", "L1"}, default "L0"
    iterations : int or None, default None
        Optimizer iterations; None keeps pysindy's default.
    differentiation : {"finite-difference", "smoothed-finite-difference", "weak"}, default "weak"
        "weak" avoids differentiating the data at all; smoothing first costs nothing on clean
        data and keeps sensor noise from being amplified by the differences.
    difference_order : int, default 4
        Order of the finite differences. At dt = 0.01 on Lorenz-63, order 2 biases ρ by 0.7 %.
    smoothing_window, smoothing_degree : int, default 9 and 4
        Savitzky–Golay smoothing before differencing (a degree-4 fit through 9 samples).
    weak_window : int, default 41
        Samples per weak-form window.
    weak_stride : int or None, default None
        Samples between weak-form windows; None: a quarter window, or closer when the library is
        large (at least four windows per term where the data allow).
    weak_degree : int, default 4
        Test function (1 − s²)^p.
    bootstrap : bool, default False
        Bagging: ``resamples`` fits on rows resampled with replacement; a term is kept when it
        is non-zero in at least ``keep_fraction`` of them; coefficients are the median over fits.
    resamples : int, default 20
    keep_fraction : float, default 0.5
    bounded_quadratic : bool, default False
        Fit a globally stable quadratic model (trapping SR3); needs the optional package cvxpy.
    seed : int, default 0
        Seed of the bootstrap's resampling (recorded in the surrogate's settings).
    n_modes : int or None, default None
        Fit in the leading principal components (the surrogate carries the transform).
    standardise : bool, default False
        Scale to unit variance first (alone, or before the PCA).

    Attributes
    ----------
    surrogate_ : Surrogate
        The fitted model, holding only the terms with a non-zero coefficient.
    coefficients_ : ndarray, shape (n_variables, n_library_terms)
    feature_names_ : list of str
        Library terms named with the Series' variable names.
    terms_ : tuple of Term
        The full library as ergodex terms, in the order of ``coefficients_``' columns.
    score_ : float
        Mean over variables of the R² of the tendency fit (weak-form rows for the weak form).
    tendency_error_ : float
        RMS of (order-4 finite-difference tendency − fitted drift) over the RMS tendency, pointwise
        on every run whatever ``differentiation`` was (so weak and pointwise fits compare).
    n_terms_ : int
        Number of non-zero coefficients.
    inclusion_probabilities_ : ndarray or None
        Bootstrap only: fraction of fits in which each coefficient was non-zero.
    ensemble_coefficients_ : ndarray or None
        Bootstrap only: shape (resamples, n_variables, n_library_terms).
    n_rows_ : int
        Rows of the regression (samples, or weak-form windows).

    Notes
    -----
    The settings are ergodex's own names; the fitter hands them to pysindy under its parameter
    names (``prune_below`` → STLSQ ``threshold``, ``ridge`` → ``alpha``, ``penalty_weight`` and
    ``penalty`` → SR3 ``reg_weight_lam`` and ``regularizer``, ``iterations`` → ``max_iter``,
    ``constant_term`` → ``include_bias``, ``harmonics`` → ``n_frequencies``,
    ``difference_order`` → ``order``). Files written with the old names are read through
    :mod:`ergodex.setting_names`.

    References
    ----------
    Brunton, S. L., Proctor, J. L. & Kutz, J. N. (2016). Discovering governing equations from data
    by sparse identification of nonlinear dynamical systems. PNAS 113(15), 3932–3937.
    Zheng, P., Askham, T., Brunton, S. L., Kutz, J. N. & Aravkin, A. Y. (2019). A unified framework
    for sparse relaxed regularized regression: SR3. IEEE Access 7, 1404–1423.
    Messenger, D. A. & Bortz, D. M. (2021). Weak SINDy: Galerkin-based data-driven model selection.
    Multiscale Modeling & Simulation 19(3), 1474–1497.
    Fasel, U., Kutz, J. N., Brunton, B. W. & Brunton, S. L. (2022). Ensemble-SINDy: robust sparse
    model discovery in the low-data, high-noise limit, with active learning and control.
    Proc. R. Soc. A 478, 20210904.
    Kaptanoglu, A. A., Callaham, J. L., Aravkin, A., Hansen, C. J. & Brunton, S. L. (2021).
    Promoting global stability in data-driven models of quadratic nonlinear dynamics.
    Phys. Rev. Fluids 6, 094401.
    de Silva, B. M. et al. (2020). PySINDy: a Python package for the sparse identification of
    nonlinear dynamical systems from data. JOSS 5(49), 2104.
    """

    method = "sparse"
    settings_table = sparse_settings_table
    fit_stages = ("term library", "regression rows", "sparse regression", "surrogate")

    def __init__(
        self,
        *,
        degree: int = 2,
        prune_below: float = 0.1,
        regression: str = "stlsq",
        terms: str = "polynomial",
        harmonics: int = 1,
        constant_term: bool = True,
        ridge: float = 0.05,
        penalty_weight: float = 0.005,
        penalty: str = "L0",
        iterations: int | None = None,
        differentiation: str = "weak",
        difference_order: int = 4,
        smoothing_window: int = 9,
        smoothing_degree: int = 4,
        weak_window: int = 41,
        weak_stride: int | None = None,
        weak_degree: int = 4,
        bootstrap: bool = False,
        resamples: int = 20,
        keep_fraction: float = 0.5,
        bounded_quadratic: bool = False,
        seed: int = 0,
        n_modes: int | None = None,
        standardise: bool = False,
    ) -> None:
        self.degree = degree
        self.prune_below = prune_below
        self.regression = regression
        self.terms = terms
        self.harmonics = harmonics
        self.constant_term = constant_term
        self.ridge = ridge
        self.penalty_weight = penalty_weight
        self.penalty = penalty
        self.iterations = iterations
        self.differentiation = differentiation
        self.difference_order = difference_order
        self.smoothing_window = smoothing_window
        self.smoothing_degree = smoothing_degree
        self.weak_window = weak_window
        self.weak_stride = weak_stride
        self.weak_degree = weak_degree
        self.bootstrap = bootstrap
        self.resamples = resamples
        self.keep_fraction = keep_fraction
        self.bounded_quadratic = bounded_quadratic
        self.seed = seed
        self.n_modes = n_modes
        self.standardise = standardise

    def _check_consistency(self) -> None:
        if self.smoothing_window % 2 == 0:
            raise SettingsError(
                f"sparse setting 'smoothing_window' must be odd; got {self.smoothing_window}"
            )
        if self.smoothing_degree >= self.smoothing_window:
            raise SettingsError(
                f"sparse setting 'smoothing_degree' ({self.smoothing_degree}) "
                "must be smaller than "
                f"'smoothing_window' ({self.smoothing_window})"
            )
        if self.bounded_quadratic and (self.degree != 2 or self.terms != "polynomial"):
            raise SettingsError(
                "sparse setting 'bounded_quadratic' needs terms = 'polynomial' and degree = 2 "
                f"(the trapping theorem is for quadratic models); got terms={self.terms!r}, "
                f"degree={self.degree}"
            )

    # ----------------------------------------------------------------------------------------
    def _fit(self, series) -> None:
        ps = _import_pysindy()
        if self.bounded_quadratic:
            _require_cvxpy()
        transform, runs, variables = reduce_series(
            series, method=self.method, n_modes=self.n_modes, standardise=self.standardise
        )
        n = len(variables)
        internal = [f"x{j}" for j in range(n)]

        self._stage(f"term library ({self.terms}, degree {self.degree}) on {n} variables")
        library = self._make_library(ps)
        library.fit([runs[0]])
        feature_names = list(library.get_feature_names(internal))
        terms = terms_from_feature_names(feature_names, n)
        names = term_names(terms, variables)

        self._stage(f"regression rows: {len(terms)} terms, {self.differentiation} tendencies")
        Theta, Y = self._regression_rows(ps, runs, float(series.dt), terms, _source(series))
        check_library_rank(Theta, names, what=_source(series))

        self._stage(
            f"sparse regression: {self.regression} on {Theta.shape[0]} rows"
            + (f", bootstrap of {self.resamples}" if self.bootstrap else "")
        )
        coefficients, extras = self._solve(ps, Theta, Y, n_features=len(terms))
        fitted = Theta @ coefficients.T
        r2 = r2_score(Y, fitted)

        self.terms_ = terms
        self.feature_names_ = names
        self.coefficients_ = coefficients
        self.score_ = float(np.mean(r2))
        self.r2_ = r2
        self.n_terms_ = int(np.count_nonzero(coefficients))
        self.n_rows_ = int(Theta.shape[0])
        self.inclusion_probabilities_ = extras.get("inclusion")
        self.ensemble_coefficients_ = extras.get("samples")
        self.transform_ = transform
        # the tendency error is measured pointwise with order-4 differences whatever the fit used,
        # so that candidates fitted in weak form and by differences compare on one scale
        self._stage("surrogate and tendency error")
        self.tendency_error_ = relative_tendency_error(
            _AsDrift(terms, coefficients), runs, float(series.dt)
        )
        self.surrogate_ = self._build_surrogate(
            series, runs, variables, transform, terms, coefficients, ps
        )

    # ----------------------------------------------------------------------------------------
    def _make_library(self, ps):
        poly = ps.PolynomialLibrary(degree=self.degree, include_bias=self.constant_term)
        if self.terms == "polynomial":
            return poly
        fourier = ps.FourierLibrary(n_frequencies=self.harmonics)
        if self.terms == "fourier":
            if not self.constant_term:
                return fourier
            return ps.PolynomialLibrary(degree=0, include_bias=True) + fourier
        return poly + fourier

    def _regression_rows(
        self, ps, runs, dt: float, terms, source: str
    ) -> tuple[np.ndarray, np.ndarray]:
        """Stack the regression rows of every run: (Θ, Y).

        Y holds the tendencies or weak integrals.
        """
        thetas, ys = [], []
        stride = self.weak_stride
        if self.differentiation == "weak" and stride is None:
            # Overlapping windows a quarter-window apart, closer when a large library needs more
            # rows: aim for at least four weak equations per library term.
            available = sum(max(r.shape[0] - self.weak_window + 1, 0) for r in runs)
            wanted = 4 * len(terms)
            stride = int(max(1, min(self.weak_window // 4, available // max(wanted, 1))))
        for index, run in enumerate(runs):
            X = np.asarray(run, dtype=float)
            needed = self._samples_needed()
            if X.shape[0] < needed:
                raise DataError(
                    f"{source}: run {index} has {X.shape[0]} samples; differentiation "
                    f"{self.differentiation!r} needs at least {needed} per run: drop the run or "
                    f"use shorter windows"
                )
            if self.differentiation == "weak":
                assert stride is not None  # set above when weak_stride is None
                Theta = evaluate_terms(terms, X)
                T, Y = weak_matrices(
                    X, Theta, dt, window=self.weak_window, stride=stride, degree=self.weak_degree
                )
            else:
                X_used, Xdot = self._pointwise(ps, X, dt)
                # drop the edges, where the stencils are one-sided and least accurate
                edge = max(self.difference_order // 2, 1)
                if self.differentiation == "smoothed-finite-difference":
                    edge = max(edge, self.smoothing_window // 2)
                X_used, Xdot = X_used[edge:-edge], Xdot[edge:-edge]
                T, Y = evaluate_terms(terms, X_used), Xdot
            thetas.append(T)
            ys.append(Y)
        return np.concatenate(thetas, axis=0), np.concatenate(ys, axis=0)

    def _samples_needed(self) -> int:
        if self.differentiation == "weak":
            return self.weak_window
        if self.differentiation == "smoothed-finite-difference":
            return self.smoothing_window + 2
        return self.difference_order + 3

    def _pointwise(self, ps, X: np.ndarray, dt: float) -> tuple[np.ndarray, np.ndarray]:
        if self.differentiation == "finite-difference":
            return X, np.asarray(ps.FiniteDifference(order=self.difference_order)(X, t=dt))
        from scipy.signal import savgol_filter

        # The smoothed states (not the raw ones) enter the library too: noise in Θ biases the
        # regression just as noise in the tendencies does.
        smoother = ps.SmoothedFiniteDifference(
            order=self.difference_order,
            smoother=savgol_filter,
            smoother_kws={
                "window_length": self.smoothing_window,
                "polyorder": self.smoothing_degree,
                "axis": 0,
            },
            save_smooth=True,
        )
        Xdot = np.asarray(smoother(X, t=dt))
        return np.asarray(smoother.smoothed_x_), Xdot

    def _make_optimizer(self, ps):
        kwargs: dict[str, Any] = {}
        if self.iterations is not None:
            kwargs["max_iter"] = self.iterations
        if self.bounded_quadratic:
            return ps.TrappingSR3(**kwargs)  # only reached when cvxpy imported
        if self.regression == "stlsq":
            return ps.STLSQ(threshold=self.prune_below, alpha=self.ridge, **kwargs)
        return ps.SR3(reg_weight_lam=self.penalty_weight, regularizer=self.penalty, **kwargs)

    def _solve(
        self, ps, Theta: np.ndarray, Y: np.ndarray, *, n_features: int
    ) -> tuple[np.ndarray, dict]:
        import warnings

        def one_fit(rows: np.ndarray | None) -> np.ndarray:
            optimizer = self._make_optimizer(ps)
            with warnings.catch_warnings():
                # pysindy warns when STLSQ removes every term of an equation; the caller sees
                # that in the coefficients and the score, so the warning adds nothing
                warnings.simplefilter("ignore", UserWarning)
                if rows is None:
                    optimizer.fit(Theta, Y)
                else:
                    optimizer.fit(Theta[rows], Y[rows])
            coef = np.asarray(optimizer.coef_, dtype=float).reshape(Y.shape[1], n_features)
            return coef

        if not self.bootstrap:
            return one_fit(None), {}
        # Bagging (Fasel et al. 2022): resample rows with replacement with our own generator.
        rng = np.random.default_rng(self.seed)
        n_rows = Theta.shape[0]
        samples = np.stack(
            [one_fit(rng.integers(0, n_rows, size=(n_rows,))) for _ in range(self.resamples)]
        )
        inclusion = np.mean(samples != 0.0, axis=0)
        coefficients = np.median(samples, axis=0)
        coefficients[inclusion < self.keep_fraction] = 0.0
        return coefficients, {"inclusion": inclusion, "samples": samples}

    def _build_surrogate(
        self, series, runs, variables, transform, terms, coefficients: np.ndarray, ps
    ):
        from ergodex.surrogate import Surrogate

        active = np.flatnonzero(np.any(coefficients != 0.0, axis=0))
        if active.size == 0:
            active = np.array([0])  # keep one column so the surrogate has a well-formed table
        provenance = data_provenance(
            series,
            runs,
            variables,
            pysindy_version=getattr(ps, "__version__", "unknown"),
            score=self.score_,
        )
        return Surrogate(
            tuple(variables),
            tuple(terms[k] for k in active),
            np.ascontiguousarray(coefficients[:, active]),
            kind="polynomial-ode",
            transform=transform,
            settings={"method": self.method, **self.get_params()},
            provenance=provenance,
        )


class _AsDrift:
    """The full coefficient table as a right-hand side (the surrogate keeps only active terms)."""

    def __init__(self, terms, coefficients: np.ndarray) -> None:
        self.terms, self.coefficients = terms, coefficients

    def rhs(self, X: np.ndarray) -> np.ndarray:
        return evaluate_terms(self.terms, X) @ self.coefficients.T


def _import_pysindy():
    try:
        import pysindy
    except ImportError as exc:  # pragma: no cover - pysindy is a core dependency
        raise OptionalDependencyError(
            "the sparse fitter needs pysindy 2.x; install it with pip install 'pysindy>=2,<3'"
        ) from exc
    return pysindy


def _require_cvxpy() -> None:
    try:
        import cvxpy  # noqa: F401
    except ImportError:
        raise OptionalDependencyError(
            "sparse setting bounded_quadratic = true needs the optional package 'cvxpy' "
            "(pysindy's TrappingSR3 "
            "solves convex programs with it); install it with pip install cvxpy, "
            "or set bounded_quadratic = false"
        ) from None
