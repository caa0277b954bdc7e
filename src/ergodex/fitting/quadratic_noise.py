"""Polynomial drift by least squares, plus a noise closure for what the drift cannot explain.

Tendencies are regressed on every monomial up to ``degree`` (ridge-regularised least squares;
no sparsity), and the residual is modelled as additive noise: white noise with the residual's
covariance, or — as in empirical model reduction — a hidden first-order autoregressive level
that carries the residual's memory. Unlike a linear inverse model, the polynomial drift can hold
several wells or regimes, so the model can reproduce non-Gaussian, multimodal statistics.
"""

from __future__ import annotations

import numpy as np

from ergodex.exceptions import DataError
from ergodex.fitting.base import Fitter, _source, data_provenance
from ergodex.fitting.energy import energy_preserving_regression
from ergodex.fitting.reduction import reduce_series
from ergodex.fitting.settings import Rule
from ergodex.fitting.tendencies import (
    check_library_rank,
    evaluate_terms,
    finite_difference,
    forward_tendencies,
    r2_score,
    term_names,
)

__all__ = ["QuadraticNoiseModel", "ridge_regression"]


def ridge_regression(Theta: np.ndarray, Y: np.ndarray, ridge: float) -> np.ndarray:
    """Least squares with a ridge penalty on unit-scaled columns: argmin ‖Y − Θ Ξᵀ‖² + ridge·N‖Ξ̃‖².

    Columns are scaled to unit RMS first so that one ``ridge`` means the same for every term;
    the penalty is relative to the number of rows N so it does not fade as data grow.

    Returns
    -------
    ndarray, shape (n_targets, n_terms)
    """
    n_rows = Theta.shape[0]
    scale = np.sqrt(np.mean(Theta**2, axis=0))
    scale[scale == 0] = 1.0
    A = Theta / scale
    if ridge > 0:
        A_aug = np.vstack([A, np.sqrt(ridge * n_rows) * np.eye(A.shape[1])])
        Y_aug = np.vstack([Y, np.zeros((A.shape[1], Y.shape[1]))])
    else:
        A_aug, Y_aug = A, Y
    solution, *_ = np.linalg.lstsq(A_aug, Y_aug, rcond=None)
    return (solution / scale[:, None]).T


class QuadraticNoiseModel(Fitter):
    """Polynomial (default quadratic) drift with an additive-noise closure of the residual.

    Parameters
    ----------
    degree : int, default 2
        Highest total degree of the drift's monomials (3 for a double-well potential).
    ridge : float, default 1e-8
        Ridge weight on unit-scaled terms (see :func:`ridge_regression`); a tiny value only
        guards against near-collinear terms.
    noise : {"white", "ar1"}, default "white"
        "white": additive white noise with covariance dt · Cov(residual) per unit time.
        "ar1": the residual r becomes hidden variables with linear dynamics
        dr = (c + Bₓ x + B_r r) dt + dW (a second level of empirical model reduction); the
        surrogate then has 2n variables, the last n named ``r_<variable>`` and unobserved
        (with ``n_modes`` or ``standardise`` the observed ones are the transform's outputs).
    differentiation : {"forward", "finite-difference"}, default "forward"
        "forward": one-step differences (x_{k+1} − x_k)/dt, the right drift estimate for
        stochastic data; "finite-difference": order-4 central differences, for smooth
        deterministic data only (on stochastic data they cancel the drift).
    n_modes : int or None, default None
        Fit in the leading principal components.
    standardise : bool, default False
        Unit variance before the PCA.
    conserve_energy : bool, default False
        Constrain the degree-2 terms so that they conserve ``½ Σ xᵢ²`` (``Σᵢ xᵢ Qᵢ(x) = 0``
        for every x; see :mod:`ergodex.fitting.energy`, Schlegel & Noack 2015): for modes of a
        flow whose nonlinearity is advection, it keeps a quadratic model from feeding energy
        into itself without bound. The energy is that of the fitted variables (the modes, with
        ``n_modes``).

    Attributes
    ----------
    surrogate_ : Surrogate
        ``kind="polynomial-stochastic"`` (white) or ``"polynomial-emr"`` (ar1).
    coefficients_ : ndarray (n, n_terms)
        Drift coefficients on ``terms_``.
    terms_, feature_names_
    noise_covariance_ : ndarray
        White: (n, n). AR(1): the hidden level's (n, n) noise.
    residual_covariance_ : ndarray (n, n)
        Covariance of the first-level residual (tendency units squared).
    ar1_matrix_ : ndarray or None
        AR(1): (n, 2n + 1) coefficients of the hidden level on [1, x, r].
    score_ : float
        Mean R² of the first-level tendency regression.
    tendency_error_ : float
        Relative RMS residual of the first level.

    References
    ----------
    Kravtsov, S., Kondrashov, D. & Ghil, M. (2005). Multilevel regression modeling of nonlinear
    processes: derivation and applications to climatic variability. J. Climate 18, 4404–4424.
    Kondrashov, D., Chekroun, M. D. & Ghil, M. (2015). Data-driven non-Markovian closure models.
    Physica D 297, 33–55.
    Schlegel, M. & Noack, B. R. (2015). On long-term boundedness of Galerkin models. J. Fluid
    Mech. 765, 325–352.
    """

    method = "quadratic-noise"
    settings_table = {
        "degree": Rule("int", low=1, high=4, help="highest total degree of the drift"),
        "ridge": Rule("float", low=0.0, help="ridge weight on unit-scaled terms"),
        "noise": Rule("choice", choices=("white", "ar1"), help="noise closure"),
        "differentiation": Rule(
            "choice", choices=("forward", "finite-difference"), help="tendency estimate"
        ),
        "n_modes": Rule(
            "int", low=1, allow_none=True, help="principal components kept (None: all variables)"
        ),
        "standardise": Rule("bool", help="unit variance before PCA"),
        "conserve_energy": Rule("bool", help="quadratic terms conserve the energy sum x_i^2 / 2"),
    }

    def __init__(
        self,
        *,
        degree: int = 2,
        ridge: float = 1e-8,
        noise: str = "white",
        differentiation: str = "forward",
        n_modes: int | None = None,
        standardise: bool = False,
        conserve_energy: bool = False,
    ) -> None:
        self.degree = degree
        self.ridge = ridge
        self.noise = noise
        self.differentiation = differentiation
        self.n_modes = n_modes
        self.standardise = standardise
        self.conserve_energy = conserve_energy

    def _fit(self, series) -> None:
        from ergodex.surrogate import Surrogate, polynomial_terms

        dt = float(series.dt)
        transform, runs, names = reduce_series(
            series, method=self.method, n_modes=self.n_modes, standardise=self.standardise
        )
        n = runs[0].shape[1]
        terms = polynomial_terms(n, self.degree)
        labels = term_names(terms, names)

        needed = 3 if self.noise == "ar1" else 2
        if self.differentiation == "finite-difference":
            needed = 5 + (1 if self.noise == "ar1" else 0)
        for index, run in enumerate(runs):
            if run.shape[0] < needed:
                raise DataError(
                    f"{_source(series)}: run {index} has {run.shape[0]} samples; the "
                    f"{self.differentiation} tendencies need at least {needed}"
                )

        # Level 1: drift. Keep per-run pieces so the AR(1) level can pair consecutive residuals.
        pieces = []
        for run in runs:
            if self.differentiation == "forward":
                X, Y = forward_tendencies([run], dt)
            else:
                X, Y = run[2:-2], finite_difference(run, dt, order=4)
            pieces.append((X, Y))
        X_all = np.concatenate([p[0] for p in pieces])
        Y_all = np.concatenate([p[1] for p in pieces])
        Theta = evaluate_terms(terms, X_all)
        check_library_rank(Theta, labels, what=_source(series))
        if self.conserve_energy:
            coefficients = energy_preserving_regression(Theta, Y_all, terms, self.ridge)
        else:
            coefficients = ridge_regression(Theta, Y_all, self.ridge)
        fitted = Theta @ coefficients.T
        residual = Y_all - fitted
        residual_cov = np.atleast_2d(np.cov(residual.T))
        r2 = r2_score(Y_all, fitted)

        provenance = data_provenance(series, runs, names, score=float(np.mean(r2)))
        settings = {"method": self.method, **self.get_params()}
        ar1 = None
        if self.noise == "white":
            # Euler–Maruyama reading of one step: residual = √(Q/dt) ξ, so Q = dt · Cov(residual).
            noise = 0.5 * (residual_cov + residual_cov.T) * dt
            surrogate = Surrogate(
                names,
                terms,
                coefficients,
                kind="polynomial-stochastic",
                noise=noise,
                transform=transform,
                settings=settings,
                provenance=provenance,
            )
        else:
            noise, ar1, surrogate = self._ar1_level(
                pieces, terms, coefficients, names, dt, transform, settings, provenance
            )

        self.terms_ = terms
        self.feature_names_ = labels
        self.coefficients_ = coefficients
        self.residual_covariance_ = residual_cov
        self.noise_covariance_ = noise
        self.ar1_matrix_ = ar1
        self.r2_ = r2
        self.score_ = float(np.mean(r2))
        self.tendency_error_ = float(np.sqrt(np.mean(residual**2) / np.mean(Y_all**2)))
        self.n_terms_ = int(np.count_nonzero(coefficients))
        self.transform_ = transform
        self.surrogate_ = surrogate

    def _ar1_level(self, pieces, terms, coefficients, names, dt, transform, settings, provenance):
        """Second level of empirical model reduction: dr = (c + Bₓ x + B_r r) dt + dW."""
        from ergodex.surrogate import Surrogate, Term

        n = len(names)
        rows_z, rows_dr = [], []
        for X, Y in pieces:
            r = Y - evaluate_terms(terms, X) @ coefficients.T
            if r.shape[0] < 2:
                continue
            rows_z.append(np.column_stack([np.ones(r.shape[0] - 1), X[:-1], r[:-1]]))
            rows_dr.append((r[1:] - r[:-1]) / dt)
        Z = np.concatenate(rows_z)
        dR = np.concatenate(rows_dr)
        B = ridge_regression(Z, dR, self.ridge)  # (n, 1 + 2n)
        eps = dR - Z @ B.T
        noise_hidden = np.atleast_2d(np.cov(eps.T)) * dt
        noise_hidden = 0.5 * (noise_hidden + noise_hidden.T)

        # Build the 2n-variable surrogate: x' = f(x) + r, r' = c + Bx x + Br r.
        hidden = tuple(f"r_{name}" for name in names)
        big_terms = [Term("monomial", tuple(t.powers) + (0,) * n) for t in terms]
        for j in range(n):
            powers = [0] * (2 * n)
            powers[n + j] = 1
            candidate = Term("monomial", tuple(powers))
            big_terms.append(candidate)
        big = np.zeros((2 * n, len(big_terms)))
        big[:n, : len(terms)] = coefficients
        big[:n, len(terms) :] = np.eye(n)
        index = {t: k for k, t in enumerate(big_terms)}
        constant = Term("monomial", (0,) * (2 * n))
        for j in range(2 * n):
            powers = [0] * (2 * n)
            powers[j] = 1
            column = index[Term("monomial", tuple(powers))]
            big[n:, column] += B[:, 1 + j]
        big[n:, index[constant]] += B[:, 0]
        noise = np.zeros((2 * n, 2 * n))
        noise[n:, n:] = noise_hidden
        settings = {**settings, "observed_variables": list(names), "hidden_variables": list(hidden)}
        # With a transform (PCA modes, standardising) the observed variables are its outputs, in
        # its order; the Surrogate maps only those to data space.
        surrogate = Surrogate(
            tuple(names) + hidden,
            big_terms,
            big,
            kind="polynomial-emr",
            noise=noise,
            transform=transform,
            settings=settings,
            provenance=provenance,
        )
        return noise_hidden, B, surrogate
