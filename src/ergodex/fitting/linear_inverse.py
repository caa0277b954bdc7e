"""Linear inverse model: linear drift plus white noise, estimated from lagged covariances.

The model is ``dx/dt = L (x − μ) + ξ`` with white noise ξ of covariance ``Q`` per unit time.
For such a process the lag-τ covariance is ``C(τ) = exp(L τ) C(0)``, so one lag τ₀ gives
``G(τ₀) = C(τ₀) C(0)⁻¹``, ``L = log G(τ₀) / τ₀``, and the stationary Lyapunov equation
``L C(0) + C(0) Lᵀ + Q = 0`` gives the noise. If the data really are linear and Markov, ``L``
does not depend on τ₀: the *tau test* refits at several lags and reports how much ``L`` changes.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg

from ergodex.exceptions import DataError, SettingsError
from ergodex.fitting.base import Fitter, _source, data_provenance
from ergodex.fitting.reduction import reduce_series
from ergodex.fitting.settings import Rule
from ergodex.fitting.tendencies import lagged_covariance, relative_tendency_error

__all__ = ["LinearInverseModel", "lim_operators"]


def lim_operators(
    C0: np.ndarray, Ctau: np.ndarray, tau: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Green's function, drift and noise of a linear inverse model from two covariances.

    Parameters
    ----------
    C0 : ndarray (n, n)
        Lag-0 covariance.
    Ctau : ndarray (n, n)
        Lag-τ covariance E[x(t+τ) x(t)ᵀ].
    tau : float
        The lag, in time units.

    Returns
    -------
    G, L, Q : ndarray (n, n)
        G = C(τ) C(0)⁻¹, L = log(G)/τ (principal logarithm), Q = −(L C(0) + C(0) Lᵀ)
        (Penland & Sardeshmukh 1995, eqs. 4–6).

    Raises
    ------
    DataError
        When G has an eigenvalue on or near the negative real axis (no real logarithm: the lag is
        longer than half the period of an oscillation in the data, so the lag aliases it).

    References
    ----------
    Penland, C. & Sardeshmukh, P. D. (1995). The optimal growth of tropical sea surface temperature
    anomalies. J. Climate 8, 1999–2024.
    """
    G = np.linalg.solve(C0.T, Ctau.T).T  # C(τ) C(0)⁻¹ without forming the inverse
    eigenvalues = np.linalg.eigvals(G)
    bad = eigenvalues[
        (eigenvalues.real <= 0) & (np.abs(eigenvalues.imag) <= 1e-8 * np.abs(eigenvalues).max())
    ]
    if bad.size:
        raise DataError(
            f"G(τ₀) = C(τ₀) C(0)⁻¹ at τ₀ = {tau:g} has the eigenvalue {bad[0].real:.3g} ≤ 0, which "
            "has no real logarithm: τ₀ is longer than half the period of an oscillation in the "
            "data or longer than the data's memory; choose a shorter tau0"
        )
    logG = _principal_log(G)
    if np.iscomplexobj(logG):
        if np.max(np.abs(logG.imag)) > 1e-8 * max(np.max(np.abs(logG.real)), 1e-300):
            raise DataError(
                f"log G(τ₀) at τ₀ = {tau:g} is not real: τ₀ aliases an oscillation of the data; "
                "choose a shorter tau0"
            )
        logG = logG.real
    L = logG / tau
    Q = -(L @ C0 + C0 @ L.T)
    Q = 0.5 * (Q + Q.T)
    return G, L, Q


def _principal_log(G: np.ndarray) -> np.ndarray:
    """Principal matrix logarithm: by eigen-decomposition when G is well diagonalisable (fast for
    the small matrices of a LIM), else by scipy's inverse scaling and squaring (Higham)."""
    w, V = np.linalg.eig(G)
    if np.linalg.cond(V) < 1e8:
        return V @ np.diag(np.log(w.astype(complex))) @ np.linalg.inv(V)
    return scipy.linalg.logm(G)


class LinearInverseModel(Fitter):
    """Linear inverse model (LIM): linear stochastically forced dynamics fitted from covariances.

    Parameters
    ----------
    tau0 : float or None, default None
        Training lag in time units (a multiple of the sampling interval). None picks half the
        e-folding time of the mean autocorrelation of the model-space variables (at least one
        sample), short enough that G(τ₀) is well estimated and long enough that sensor noise
        (which inflates C(0) only) matters little.
    tau_test : list of float, default [0.5, 1, 2, 3]
        Lags of the tau test, as multiples of τ₀ (rounded to whole samples).
    tau_test_tolerance : float, default 0.15
        The tau test is called flat when ‖L(τ) − L(τ₀)‖ / ‖L(τ₀)‖ stays below this for every
        tested lag.
    n_modes : int or None, default None
        Fit in the space of the leading principal components (needed when there are many
        variables); None fits the variables themselves.
    standardise : bool, default False
        Scale each variable to unit variance before the PCA (for variables in different units).
    unstable : {"refuse", "flag"}, default "refuse"
        What to do when L has an eigenvalue with a non-negative real part (a growing mode: the
        model would blow up): raise DataError, or keep the model and set ``stable_ = False``.
    negative_noise : {"clip", "refuse"}, default "clip"
        What to do when Q has negative eigenvalues (the data are not linear plus white noise at
        this lag): set them to zero (reported in ``noise_report_``) or raise DataError.

    Attributes
    ----------
    surrogate_ : Surrogate
        ``kind="linear-stochastic"``: terms 1, x₁ … xₙ (the constant holds −L μ), noise Q; with
        ``n_modes`` the variables are the principal components and the surrogate carries the
        transform.
    tau0_ : float
        The lag used.
    G_, L_, Q_ : ndarray
        Green's function, drift and the raw noise covariance (before clipping).
    noise_covariance_ : ndarray
        Q after clipping (the surrogate's noise).
    L_eigenvalues_ : ndarray (complex)
        Eigenvalues of L; every real part must be negative.
    decay_times_ : ndarray
        −1 / Re(eigenvalue) for each mode, in time units.
    stable_ : bool
    noise_eigenvalues_ : ndarray
        Eigenvalues of the raw Q, ascending.
    noise_report_ : str
        What was found about Q and what was done.
    tau_test_ : dict
        ``lags`` (time units), ``relative_change`` (per lag), ``eigenvalues`` (per lag),
        ``tolerance`` and ``flat``.
    tau_test_flat_ : bool
    score_ : float
        Mean R² of the lag-τ₀ forecast G x(t) of x(t + τ₀) over the model-space variables.
    tendency_error_ : float
        Relative RMS difference of finite-difference tendencies from the drift.
    mean_, C0_ : ndarray
        Model-space mean and lag-0 covariance.

    References
    ----------
    Penland, C. (1989). Random forcing and forecasting using principal oscillation pattern
    analysis. Monthly Weather Review 117, 2165–2185.
    Penland, C. & Sardeshmukh, P. D. (1995). The optimal growth of tropical sea surface temperature
    anomalies. J. Climate 8, 1999–2024.
    """

    method = "linear-inverse"
    settings_table = {
        "tau0": Rule(
            "float", low=0.0, low_open=True, allow_none=True, help="training lag (time units)"
        ),
        "tau_test": Rule(
            "float-list", low=0.0, low_open=True, help="tau-test lags as multiples of tau0"
        ),
        "tau_test_tolerance": Rule(
            "float", low=0.0, low_open=True, help="relative change of L called flat"
        ),
        "n_modes": Rule(
            "int", low=1, allow_none=True, help="principal components kept (None: all variables)"
        ),
        "standardise": Rule("bool", help="unit variance before PCA"),
        "unstable": Rule(
            "choice", choices=("refuse", "flag"), help="growing modes: refuse or flag"
        ),
        "negative_noise": Rule(
            "choice", choices=("clip", "refuse"), help="negative noise eigenvalues"
        ),
    }

    def __init__(
        self,
        *,
        tau0: float | None = None,
        tau_test: list[float] | tuple[float, ...] = (0.5, 1.0, 2.0, 3.0),
        tau_test_tolerance: float = 0.15,
        n_modes: int | None = None,
        standardise: bool = False,
        unstable: str = "refuse",
        negative_noise: str = "clip",
    ) -> None:
        self.tau0 = tau0
        self.tau_test = tau_test
        self.tau_test_tolerance = tau_test_tolerance
        self.n_modes = n_modes
        self.standardise = standardise
        self.unstable = unstable
        self.negative_noise = negative_noise

    def _fit(self, series) -> None:
        from ergodex.surrogate import Surrogate, polynomial_terms

        dt = float(series.dt)
        transform, runs, names = self._reduce(series)
        n = runs[0].shape[1]
        mean = np.concatenate(runs).mean(axis=0)
        C0, _ = lagged_covariance(runs, 0, mean)
        if np.linalg.cond(C0) > 1e12:
            raise DataError(
                f"{_source(series)}: the covariance of the {n} variables is singular (some are "
                f"linear combinations of others); fit in principal components with n_modes < {n}"
            )

        longest = max(r.shape[0] for r in runs)
        max_lag = longest // 2
        lag0 = self._lag_samples(runs, mean, C0, dt)
        if lag0 > max_lag:
            raise DataError(
                f"{_source(series)}: tau0 = {lag0 * dt:g} ({lag0} samples) is longer than the data "
                f"allow: the longest run has {longest} samples, so tau0 may be at most "
                f"{max_lag * dt:g} (half of it); choose a shorter tau0 or supply longer runs"
            )
        tau0 = lag0 * dt
        Ctau, pairs = lagged_covariance(runs, lag0, mean)
        if pairs < 10 * n:
            raise DataError(
                f"{_source(series)}: only {pairs} sample pairs {tau0:g} apart for {n} variables; "
                f"at least {10 * n} are needed: shorten tau0 or add data"
            )
        G, L, Q = lim_operators(C0, Ctau, tau0)

        eigenvalues = np.linalg.eigvals(L)
        stable = bool(np.all(eigenvalues.real < 0))
        if not stable and self.unstable == "refuse":
            worst = eigenvalues[np.argmax(eigenvalues.real)]
            raise DataError(
                f"{_source(series)}: the fitted drift L has a growing mode (eigenvalue "
                f"{worst:.3g}, real part ≥ 0), so the model would blow up: the data are not a "
                f"stationary linear process at tau0 = {tau0:g}; try another tau0, fewer modes, or "
                "unstable = 'flag' to keep it anyway"
            )

        noise_eigenvalues = np.linalg.eigvalsh(Q)
        negative = noise_eigenvalues[noise_eigenvalues < 0]
        if negative.size:
            message = (
                f"Q has {negative.size} negative eigenvalue(s) (most negative "
                f"{negative.min():.3g}, largest {noise_eigenvalues.max():.3g}): the data are not "
                f"linear plus white noise at tau0 = {tau0:g}"
            )
            if self.negative_noise == "refuse":
                raise DataError(
                    f"{_source(series)}: {message}; set negative_noise = 'clip' to keep the model"
                )
            w, V = np.linalg.eigh(Q)
            noise = (V * np.clip(w, 0.0, None)) @ V.T
            noise = 0.5 * (noise + noise.T)
            removed = float(np.sum(-negative) / np.sum(np.abs(noise_eigenvalues)))
            message += (
                "; the negative eigenvalues were set to zero (Q replaced by its positive "
                f"semi-definite part; {removed:.1%} of the eigenvalue magnitude removed)"
            )
        else:
            noise = Q
            message = "Q is positive semi-definite; no correction needed"

        self.tau_test_ = self._tau_test(runs, mean, C0, L, lag0, max_lag, dt)
        self.tau_test_flat_ = bool(self.tau_test_["flat"])

        # lag-τ₀ forecast skill: R² of G (x(t) − μ) for x(t+τ₀) − μ, pooled over runs and variables
        ss_res = np.zeros(n)
        ss_tot = np.zeros(n)
        for run in runs:
            A = run - mean
            if A.shape[0] <= lag0:
                continue
            future, past = A[lag0:], A[:-lag0]
            ss_res += np.sum((future - past @ G.T) ** 2, axis=0)
            ss_tot += np.sum(future**2, axis=0)
        score = float(np.mean(1.0 - ss_res / ss_tot))

        terms = polynomial_terms(n, 1)
        coefficients = np.column_stack([-L @ mean, L])
        surrogate = Surrogate(
            names,
            terms,
            coefficients,
            kind="linear-stochastic",
            noise=noise,
            transform=transform,
            settings={
                "method": self.method,
                **_json_settings(self.get_params()),
                "tau0_used": tau0,
            },
            provenance=data_provenance(
                series,
                runs,
                names,
                score=score,
                stable=stable,
                tau_test_flat=self.tau_test_flat_,
                noise_report=message,
            ),
        )
        self.tau0_ = tau0
        self.mean_ = mean
        self.C0_ = C0
        self.G_ = G
        self.L_ = L
        self.Q_ = Q
        self.noise_covariance_ = noise
        self.L_eigenvalues_ = eigenvalues
        with np.errstate(divide="ignore"):
            self.decay_times_ = -1.0 / eigenvalues.real
        self.stable_ = stable
        self.noise_eigenvalues_ = noise_eigenvalues
        self.noise_report_ = message
        self.score_ = score
        self.n_terms_ = int(np.count_nonzero(coefficients))
        self.transform_ = transform
        self.surrogate_ = surrogate
        self.tendency_error_ = relative_tendency_error(surrogate, runs, dt)

    def _reduce(self, series):
        """The transform, the runs in model space and their names (a subclass may widen the
        runs)."""
        return reduce_series(
            series, method=self.method, n_modes=self.n_modes, standardise=self.standardise
        )

    def _lag_samples(self, runs, mean, C0, dt: float) -> int:
        if self.tau0 is not None:
            lag = int(round(self.tau0 / dt))
            if lag < 1 or abs(lag * dt - self.tau0) > 1e-6 * max(self.tau0, dt):
                raise SettingsError(
                    f"linear-inverse setting 'tau0' = {self.tau0:g} must be a whole number (≥ 1) "
                    f"of sampling intervals dt = {dt:g}"
                )
            return lag
        # Half the e-folding time of the mean normalised autocorrelation (see the class docstring).
        variances = np.diag(C0)
        longest = max(r.shape[0] for r in runs)
        for lag in range(1, longest // 2 + 1):
            C, _ = lagged_covariance(runs, lag, mean)
            if np.mean(np.diag(C) / variances) < np.exp(-1.0):
                return max(1, lag // 2)
        return max(1, longest // 4)

    def _tau_test(self, runs, mean, C0, L0, lag0, max_lag, dt) -> dict:
        lags, changes, eigenvalues, problems = [], [], [], []
        norm = np.linalg.norm(L0)
        for factor in sorted(set(float(f) for f in self.tau_test)):
            lag = max(1, int(round(factor * lag0)))
            if lag > max_lag or lag * dt in lags:
                continue
            Ctau, _ = lagged_covariance(runs, lag, mean)
            try:
                _, L, _ = lim_operators(C0, Ctau, lag * dt)
            except DataError as exc:
                problems.append(f"tau = {lag * dt:g}: {exc}")
                continue
            lags.append(lag * dt)
            changes.append(float(np.linalg.norm(L - L0) / norm))
            eigenvalues.append(np.linalg.eigvals(L))
        flat = bool(not problems and changes and max(changes) < self.tau_test_tolerance)
        return {
            "lags": lags,
            "relative_change": changes,
            "eigenvalues": eigenvalues,
            "tolerance": self.tau_test_tolerance,
            "flat": flat,
            "problems": problems,
        }


def _json_settings(params: dict) -> dict:
    return {k: (list(v) if isinstance(v, tuple) else v) for k, v in params.items()}
