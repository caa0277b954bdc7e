"""Pure numerics shared by the fitters: term tables, finite differences, weak-form matrices, checks.

Nothing here reads files or imports pysindy; the functions take arrays and return arrays.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from ergodex.exceptions import DataError

__all__ = [
    "terms_from_feature_names",
    "evaluate_terms",
    "term_names",
    "finite_difference",
    "weak_test_functions",
    "weak_matrices",
    "check_library_rank",
    "r2_score",
]


def terms_from_feature_names(names: Sequence[str], n_variables: int) -> tuple:
    """Turn pysindy feature names (``'1'``, ``'x0 x1'``, ``'x0^2'``, ``'sin(1 x0)'``) into Terms.

    Uses the surrogate module's strict parser (the one :func:`ergodex.surrogate.from_pysindy`
    uses), so a library term ergodex cannot represent is refused rather than guessed.
    """
    from ergodex.surrogate import _parse_pysindy_feature

    return tuple(_parse_pysindy_feature(name, n_variables) for name in names)


def evaluate_terms(terms: Sequence, X: np.ndarray) -> np.ndarray:
    """Evaluate every term at every state: (n_samples, n_variables) → (n_samples, n_terms).

    Goes through :meth:`ergodex.surrogate.Surrogate.features`, the evaluation the integrator
    uses, so the regression sees exactly the functions the fitted model will integrate.
    """
    from ergodex.surrogate import Surrogate

    X = np.asarray(X, dtype=float)
    n = X.shape[1]
    probe = Surrogate([f"x{j}" for j in range(n)], terms, np.zeros((n, len(terms))))
    return probe.features(X)


def term_names(terms: Sequence, variables: Sequence[str]) -> list[str]:
    """Human-readable names of terms (``'1'``, ``'flow dT_up'``, ``'flow^2'``,
    ``'sin(2 flow)'``)."""
    return [term.label(variables) for term in terms]


# Central-difference weights for the first derivative (standard Taylor-series stencils,
# common practice, no source): order 2 → (-1/2, 0, 1/2), order 4 → (1/12, -2/3, 0, 2/3, -1/12).
_CENTRAL = {
    2: np.array([-0.5, 0.0, 0.5]),
    4: np.array([1 / 12, -2 / 3, 0.0, 2 / 3, -1 / 12]),
}


def finite_difference(X: np.ndarray, dt: float, order: int = 4) -> np.ndarray:
    """First time derivative by central differences, with the edges dropped.

    Parameters
    ----------
    X : ndarray, shape (n_samples, n_variables)
    dt : float
    order : {2, 4}
        Order of accuracy of the central stencil.

    Returns
    -------
    ndarray, shape (n_samples - order, n_variables)
        Derivatives at samples ``order//2 … n_samples - order//2 - 1``.
    """
    weights = _CENTRAL[order]
    half = len(weights) // 2
    n = X.shape[0]
    out = np.zeros((n - 2 * half, X.shape[1]))
    for k, w in enumerate(weights):
        if w:
            out += w * X[k : n - 2 * half + k]
    return out / dt


def weak_test_functions(n_points: int, dt: float, degree: int) -> tuple[np.ndarray, np.ndarray]:
    """Quadrature weights of a bump test function and of its derivative on one window.

    The test function is φ(t) = (1 − s²)^p with s running from −1 to 1 over the window (zero with
    p − 1 derivatives at both ends, so the trapezoid rule is highly accurate and the boundary
    terms of integration by parts vanish), scaled so that ∫φ dt = 1: the weak equations then
    have the same units as pointwise tendencies and a threshold keeps its meaning.

    Returns
    -------
    phi_weights, dphi_weights : ndarray, shape (n_points,)
        ``phi_weights @ f`` ≈ ∫ φ f dt and ``dphi_weights @ f`` ≈ ∫ φ' f dt over the window.

    References
    ----------
    Messenger, D. A. & Bortz, D. M. (2021). Weak SINDy: Galerkin-based data-driven model selection.
    Multiscale Modeling & Simulation 19(3), 1474–1497.
    """
    half_width = 0.5 * (n_points - 1) * dt
    s = np.linspace(-1.0, 1.0, n_points)
    base = 1.0 - s * s
    phi = base**degree
    dphi = -2.0 * degree * s * base ** (degree - 1) / half_width  # dφ/dt = dφ/ds · ds/dt
    weights = np.full(n_points, dt)
    weights[[0, -1]] *= 0.5  # trapezoid rule
    norm = np.sum(weights * phi)
    return weights * phi / norm, weights * dphi / norm


def weak_matrices(
    X: np.ndarray, Theta: np.ndarray, dt: float, *, window: int, stride: int, degree: int
) -> tuple[np.ndarray, np.ndarray]:
    """Weak-form regression rows of one run: ∫φ_k Θ(x) dt and −∫φ_k' x dt for each window k.

    Integration by parts turns ∫φ ẋ dt into −∫φ' x dt, so no derivative of the (noisy) data is
    ever taken; the sensor noise is averaged over each window instead of amplified by differencing.

    Parameters
    ----------
    X : ndarray, shape (n_samples, n_variables)
    Theta : ndarray, shape (n_samples, n_terms)
        Library evaluated pointwise on ``X``.
    window : int
        Samples per test-function window (odd keeps it centred on a sample).
    stride : int
        Samples between the starts of consecutive windows.

    Returns
    -------
    Theta_weak : ndarray, shape (n_windows, n_terms)
    Y_weak : ndarray, shape (n_windows, n_variables)

    References
    ----------
    Messenger, D. A. & Bortz, D. M. (2021). Weak SINDy: Galerkin-based data-driven model selection.
    Multiscale Modeling & Simulation 19(3), 1474–1497.
    """
    phi, dphi = weak_test_functions(window, dt, degree)
    windows_theta = np.lib.stride_tricks.sliding_window_view(Theta, window, axis=0)[::stride]
    windows_x = np.lib.stride_tricks.sliding_window_view(X, window, axis=0)[::stride]
    return windows_theta @ phi, -(windows_x @ dphi)


def check_library_rank(Theta: np.ndarray, names: Sequence[str], *, what: str = "the data") -> None:
    """Raise :class:`DataError` when the library cannot be fitted: too few rows or dependent
    columns.

    Columns are scaled to unit norm first so that the rank test does not depend on the units of the
    variables; a relative singular value below 1e-10 counts as a dependency.
    """
    n_rows, n_terms = Theta.shape
    if n_rows < n_terms:
        raise DataError(
            f"{what}: the term library has {n_terms} terms but only {n_rows} usable samples; "
            f"at least {n_terms} are needed (more than {2 * n_terms} for a stable fit): "
            f"add runs or longer runs, or lower the degree"
        )
    norms = np.linalg.norm(Theta, axis=0)
    zero = [names[int(k)] for k in np.flatnonzero(norms == 0)]
    if zero:
        raise DataError(
            f"{what}: library term(s) {', '.join(zero)} are zero on every sample; remove them"
        )
    scaled = Theta / norms
    _, s, vt = np.linalg.svd(scaled, full_matrices=False)
    if s[-1] < 1e-10 * s[0]:
        dependent = np.flatnonzero(np.abs(vt[-1]) > 0.1 * np.abs(vt[-1]).max())
        listed = ", ".join(repr(names[int(k)]) for k in dependent)
        rank = int(np.sum(s >= 1e-10 * s[0]))
        raise DataError(
            f"{what}: the term library is rank-deficient (rank {rank} of {n_terms} terms); the "
            f"terms {listed} are linearly dependent on these data: lower the degree, drop a "
            "variable that is a combination of others, or add data that moves every variable"
        )


def r2_score(Y: np.ndarray, Y_fit: np.ndarray) -> np.ndarray:
    """Coefficient of determination per column, 1 − SS_res / SS_tot (common practice, no source)."""
    ss_res = np.sum((Y - Y_fit) ** 2, axis=0)
    ss_tot = np.sum((Y - Y.mean(axis=0)) ** 2, axis=0)
    return 1.0 - ss_res / np.where(ss_tot > 0, ss_tot, 1.0)


def lagged_covariance(
    runs: Sequence[np.ndarray], lag: int, mean: np.ndarray
) -> tuple[np.ndarray, int]:
    """Covariance C(τ) = E[x(t+τ) x(t)ᵀ] of anomalies, pooled over runs (pairs never cross runs).

    Parameters
    ----------
    runs : sequence of ndarray, each (n_samples_i, n_variables)
    lag : int
        Lag in samples (0 gives the ordinary covariance).
    mean : ndarray, shape (n_variables,)
        Mean removed from every run (the pooled mean, so that all runs share one origin).

    Returns
    -------
    C : ndarray, shape (n_variables, n_variables)
    n_pairs : int
        Number of (t, t+τ) pairs used.
    """
    n = len(mean)
    total = np.zeros((n, n))
    pairs = 0
    for run in runs:
        X = np.asarray(run, dtype=float) - mean
        if X.shape[0] <= lag:
            continue
        total += X[lag:].T @ X[: X.shape[0] - lag]
        pairs += X.shape[0] - lag
    return total / max(pairs, 1), pairs


def forward_tendencies(runs: Sequence[np.ndarray], dt: float) -> tuple[np.ndarray, np.ndarray]:
    """Forward-difference tendencies (x_{k+1} − x_k)/dt paired with the states x_k, over all runs.

    Forward (not central) differences are the right estimate of the drift of a stochastic process:
    for a reversible diffusion the backward increment has the opposite conditional mean, so a
    central difference would cancel the drift (Kloeden & Platen 1992, §9.1; the same one-step
    increments are used in empirical model reduction, Kravtsov, Kondrashov & Ghil 2005).
    """
    states, tendencies = [], []
    for run in runs:
        X = np.asarray(run, dtype=float)
        states.append(X[:-1])
        tendencies.append((X[1:] - X[:-1]) / dt)
    return np.concatenate(states), np.concatenate(tendencies)


def relative_tendency_error(surrogate, runs: Sequence[np.ndarray], dt: float) -> float:
    """RMS of (order-4 finite-difference tendency − surrogate drift) over RMS tendency, in model
    space.

    One figure comparable across fitters for the selection front. For a stochastic model the
    noise makes it large whatever the drift; compare it only between models of one kind.
    """
    residual = 0.0
    scale = 0.0
    for run in runs:
        X = np.asarray(run, dtype=float)
        if X.shape[0] < 5:
            continue
        Y = finite_difference(X, dt, order=4)
        F = surrogate.rhs(X[2:-2])
        residual += float(np.sum((Y - F) ** 2))
        scale += float(np.sum(Y**2))
    return float(np.sqrt(residual / scale)) if scale > 0 else float("nan")
