"""Linear inverse model with per-mode cubic damping, calibrated against long-run statistics.

A linear model driven by Gaussian white noise has Gaussian statistics; data whose leading modes
have lighter tails than a Gaussian (negative excess kurtosis, as on the ring of 40 stations) are
out of its reach. This fitter starts from the linear inverse model's drift ``L`` and noise ``Q``
and adds, per model-space variable, a cubic damping ``−cᵢ (xᵢ − μᵢ)³`` with ``cᵢ ≥ 0`` (so the
model stays bounded), a scale ``rᵢ`` of that variable's row of ``L``, a shift ``dᵢ |Lᵢᵢ|`` of its
diagonal entry (damping apart from frequency: a wave pair's memory) and a scale ``sᵢ`` of its
noise (``Q → S Q S``). The 4n parameters are tuned by ensemble Kalman inversion
(:mod:`ergodex.fitting.calibration`) so that the surrogate's long-run variance, kurtosis and
autocorrelation at a few lags per variable match those of the fit runs; the noise of those
statistics is estimated from pieces of the fit runs themselves. Held-out data are never seen.
"""

from __future__ import annotations

import numpy as np

from ergodex.exceptions import DataError
from ergodex.fitting.calibration import ensemble_kalman_inversion
from ergodex.fitting.linear_inverse import LinearInverseModel
from ergodex.fitting.reduction import cyclic_rotations, model_space_runs, reduce_series
from ergodex.fitting.settings import Rule

__all__ = [
    "CalibratedLinearInverse",
    "statistics_vector",
    "piece_noise_covariance",
    "surrogate_statistics",
]


def statistics_vector(runs: list[np.ndarray], lags: tuple[int, ...]) -> np.ndarray:
    """Variance, kurtosis and autocorrelation at ``lags`` of each variable, pooled over runs.

    Parameters
    ----------
    runs : list of ndarray (T, n)
    lags : tuple of int
        Lags in samples (each ≥ 1 and shorter than every run).

    Returns
    -------
    ndarray (n · (2 + len(lags)),)
        Blocks in the order: variances (n), kurtoses m₄/m₂² (n), then one block of n
        autocorrelations per lag (sum of lagged products within runs over all products, the
        biased estimator of :func:`ergodex.stats.autocorrelation`).
    """
    stacked = np.concatenate(runs)
    mean = stacked.mean(axis=0)
    centred = [r - mean for r in runs]
    m2 = np.mean(np.concatenate(centred) ** 2, axis=0)
    m4 = np.mean(np.concatenate(centred) ** 4, axis=0)
    blocks = [m2, m4 / m2**2]
    total = sum(len(r) for r in runs)
    for lag in lags:
        products = sum(np.sum(c[lag:] * c[:-lag], axis=0) for c in centred)
        blocks.append(products / (total * m2))
    return np.concatenate(blocks)


def piece_noise_covariance(
    runs: list[np.ndarray], lags: tuple[int, ...], n_pieces: int
) -> np.ndarray:
    """Diagonal sampling covariance of :func:`statistics_vector` on ``runs``, from their pieces.

    Each run is cut into pieces of equal length (``n_pieces`` in all); the variance of a
    statistic across pieces, divided by the number of pieces, estimates the variance of the
    statistic over all the runs (pieces much longer than the memory are nearly independent).
    Only the diagonal is kept: a handful of pieces cannot estimate a full covariance.
    """
    per_run = max(1, n_pieces // len(runs))
    pieces: list[np.ndarray] = []
    for run in runs:
        length = len(run) // per_run
        if length <= max(lags) + 2:
            raise DataError(
                f"runs of {len(run)} samples are too short to cut into {per_run} pieces longer "
                f"than the largest lag ({max(lags)} samples); supply longer runs"
            )
        pieces.extend(run[k * length : (k + 1) * length] for k in range(per_run))
    values = np.array([statistics_vector([p], lags) for p in pieces])
    variance = values.var(axis=0, ddof=1) / len(pieces)
    floor = 1e-6 * np.maximum(np.abs(values.mean(axis=0)), 1e-12)
    return np.diag(np.maximum(variance, floor**2))


def surrogate_statistics(
    surrogate,
    initial_states: np.ndarray,
    *,
    dt: float,
    n_out: int,
    spinup: float,
    lags: tuple[int, ...],
    seed: int,
    stiffness_states: np.ndarray | None = None,
    bound: np.ndarray | None = None,
) -> np.ndarray:
    """Long-run :func:`statistics_vector` of a surrogate's ensemble; all NaN if a member blew up.

    The members start from ``initial_states`` (one per row), are spun up for ``spinup`` and
    record ``n_out`` outputs every ``dt``; the same ``seed`` gives the same noise path, so
    nearby parameters see common random numbers (a smoother forward map for the calibration).
    """
    from ergodex.integrate import integrate_ensemble

    result = integrate_ensemble(
        surrogate,
        initial_states,
        dt_out=dt,
        n_out=n_out,
        spinup=spinup,
        seed=seed,
        stiffness_states=stiffness_states,
        bound=bound,
    )
    n = surrogate.n_variables
    if result.n_blown_up:
        return np.full(n * (2 + len(lags)), np.nan)
    return statistics_vector(list(result.states[:, :, :n]), lags)


class CalibratedLinearInverse(LinearInverseModel):
    """Linear inverse model plus cubic damping, with drift, damping and noise scales calibrated.

    Takes every setting of :class:`~ergodex.fitting.linear_inverse.LinearInverseModel`, plus:

    Parameters
    ----------
    cubic_damping : bool, default True
        Add ``−cᵢ (xᵢ − μᵢ)³`` (cᵢ ≥ 0) to each variable's equation; False calibrates only the
        drift and noise scales of the linear model.
    calibration_lags : list of float, default [1, 2, 4]
        Lags of the autocorrelation targets, as multiples of τ₀ (rounded to whole samples).
    members : int, default 40
        Size of the ensemble Kalman inversion's parameter ensemble.
    iterations : int, default 8
        Ensemble Kalman updates.
    simulation_length : float, default 2.0
        Length of each forward run, as a multiple of the total length of the fit runs; its
        sampling noise is added to the data's in Γ.
    n_pieces : int, default 8
        Pieces the fit runs are cut into to estimate the noise of the target statistics.
    seed : int, default 0
        Seeds the calibration (parameter ensemble, perturbed observations and forward runs).
    homogeneous : bool, default False
        The variables are stations on a ring with the same statistics under a cyclic shift
        (say so only when that is known): the transform, the linear model and the target
        statistics use the runs plus all their rotations around the ring (see
        :func:`~ergodex.fitting.reduction.cyclic_rotations`), so the modes are Fourier pairs;
        the noise of the targets still comes from pieces of the runs as given; the two modes of
        each Fourier pair share their calibrated parameters.

    Attributes
    ----------
    Those of :class:`LinearInverseModel` (for the uncalibrated linear model), and:
    drift_scale_, damping_shift_, noise_scale_, cubic_coefficients_ : ndarray (n,)
        The calibrated rᵢ, dᵢ |Lᵢᵢ| (added to the diagonal of the scaled L), sᵢ, cᵢ.
    target_statistics_, calibrated_statistics_ : ndarray
        The fit runs' statistics and the calibrated model's (variance, kurtosis, autocorrelation
        at each lag; n per block).
    parameter_groups_ : ndarray of int (n,)
        Variables with the same label share their calibrated parameters.
    calibration_misfit_ : list of float
        Data misfit per statistic at each iteration (about 1 when within the noise).
    score_ : float
        As for the linear inverse model (lag-τ₀ forecast R² of the linear part).

    References
    ----------
    Penland, C. & Sardeshmukh, P. D. (1995). The optimal growth of tropical sea surface temperature
    anomalies. J. Climate 8, 1999–2024.
    Iglesias, M. A., Law, K. J. H. & Stuart, A. M. (2013). Ensemble Kalman methods for inverse
    problems. Inverse Problems 29, 045001.
    Cleary, E., Garbuno-Inigo, A., Lan, S., Schneider, T. & Stuart, A. M. (2021). Calibrate,
    emulate, sample. J. Comput. Phys. 424, 109716.
    """

    method = "calibrated-linear-inverse"
    settings_table = {
        **LinearInverseModel.settings_table,
        "cubic_damping": Rule("bool", help="add per-variable cubic damping (coefficient >= 0)"),
        "calibration_lags": Rule(
            "float-list",
            low=0.0,
            low_open=True,
            help="autocorrelation target lags, multiples of tau0",
        ),
        "members": Rule("int", low=4, help="parameter ensemble size of the calibration"),
        "iterations": Rule("int", low=0, high=50, help="ensemble Kalman updates"),
        "simulation_length": Rule(
            "float",
            low=0.0,
            low_open=True,
            help="forward run length, multiple of the fit runs' length",
        ),
        "n_pieces": Rule("int", low=2, help="pieces of the fit runs for the statistics' noise"),
        "seed": Rule("int", low=0, help="seed of the calibration"),
        "homogeneous": Rule("bool", help="variables on a homogeneous ring: fit on all rotations"),
    }
    fit_stages = ("linear inverse model", "calibration")

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
        cubic_damping: bool = True,
        calibration_lags: list[float] | tuple[float, ...] = (1.0, 2.0, 4.0),
        members: int = 40,
        iterations: int = 8,
        simulation_length: float = 2.0,
        n_pieces: int = 8,
        seed: int = 0,
        homogeneous: bool = False,
    ) -> None:
        super().__init__(
            tau0=tau0,
            tau_test=tau_test,
            tau_test_tolerance=tau_test_tolerance,
            n_modes=n_modes,
            standardise=standardise,
            unstable=unstable,
            negative_noise=negative_noise,
        )
        self.cubic_damping = cubic_damping
        self.calibration_lags = calibration_lags
        self.members = members
        self.iterations = iterations
        self.simulation_length = simulation_length
        self.n_pieces = n_pieces
        self.seed = seed
        self.homogeneous = homogeneous

    def _reduce(self, series):
        if not self.homogeneous:
            return super()._reduce(series)
        return reduce_series(
            cyclic_rotations(series),
            method=self.method,
            n_modes=self.n_modes,
            standardise=self.standardise,
        )

    def _fit(self, series) -> None:
        self._stage("linear inverse model")
        super()._fit(series)
        linear = self.surrogate_
        runs, _ = model_space_runs(series, linear.transform)
        pooled = runs
        if self.homogeneous:
            pooled = model_space_runs(cyclic_rotations(series), linear.transform)[0]
        dt = float(series.dt)
        lag0 = int(round(self.tau0_ / dt))
        lags = tuple(sorted({max(1, int(round(f * lag0))) for f in self.calibration_lags}))
        shortest = min(len(r) for r in runs)
        if max(lags) >= shortest // 4:
            raise DataError(
                f"the calibration lags (up to {max(lags)} samples) need runs of at least "
                f"{4 * max(lags)} samples; the shortest has {shortest}: shorten calibration_lags"
            )
        self._stage("calibration")
        n = len(self.mean_)
        target = statistics_vector(pooled, lags)
        n_members_sim = max(2, len(runs))
        total = sum(len(r) for r in runs)
        n_out = max(4 * max(lags), int(np.ceil(self.simulation_length * total / n_members_sim)))
        ratio = n_out * n_members_sim / total  # forward run length over data length
        gamma = piece_noise_covariance(runs, lags, self.n_pieces) * (1.0 + 1.0 / ratio)

        rng = np.random.default_rng(self.seed)
        forward_seed = int(rng.integers(2**31))
        stacked = np.concatenate(pooled)
        starts = stacked[rng.choice(len(stacked), size=n_members_sim, replace=False)]
        from ergodex.integrate import blowup_bound

        bound = blowup_bound(stacked)
        stiffness_states = stacked[:: max(1, len(stacked) // 256)]
        sigma2 = np.diag(self.C0_)
        damping_unit = np.abs(np.diag(self.L_)) / sigma2  # c in units of |Lᵢᵢ| / σᵢ²
        groups = self._parameter_groups(linear.transform, n)
        g = int(groups.max()) + 1
        p = 4 * g if self.cubic_damping else 3 * g
        # Prior: drift and noise scales log-normal around 1 (±20 %, ±30 %); cubic damping
        # around a tenth of the unit, an order of magnitude either way (common practice for
        # scale parameters, no source for the widths).
        prior = np.empty((self.members, p))
        prior[:, :g] = np.exp(rng.normal(0.0, 0.2, size=(self.members, g)))
        prior[:, g : 2 * g] = np.exp(rng.normal(0.0, 0.3, size=(self.members, g)))
        prior[:, 2 * g : 3 * g] = rng.normal(0.0, 0.2, size=(self.members, g))
        if self.cubic_damping:
            prior[:, 3 * g :] = np.exp(rng.normal(np.log(0.1), 1.0, size=(self.members, g)))

        positive = np.ones(p, dtype=bool)
        positive[2 * g : 3 * g] = False  # the damping shifts may take either sign

        def expand(theta: np.ndarray) -> np.ndarray:
            """Per-group parameters → per-variable (r, s, d, c), c in its own units."""
            blocks = [theta[k * g : (k + 1) * g][groups] for k in range(3)]
            c = theta[3 * g :][groups] * damping_unit if self.cubic_damping else np.zeros(n)
            return np.concatenate(blocks + [c])

        def build(theta: np.ndarray):
            full = expand(theta)
            r, s, d, c = full[:n], full[n : 2 * n], full[2 * n : 3 * n], full[3 * n :]
            return self._damped_surrogate(linear, r, s, d, c), c

        def forward(thetas: np.ndarray) -> np.ndarray:
            out = np.empty((len(thetas), len(target)))
            for j, theta in enumerate(thetas):
                surrogate, _ = build(theta)
                out[j] = surrogate_statistics(
                    surrogate,
                    starts,
                    dt=dt,
                    n_out=n_out,
                    spinup=5.0 * self.tau0_ * max(lags),
                    lags=lags,
                    seed=forward_seed,
                    stiffness_states=stiffness_states,
                    bound=bound,
                )
            return out

        stage_state = self.__dict__.get("_stage_state")

        def progress(done: int, total_steps: int) -> None:
            if stage_state is not None and stage_state[2] is not None:
                # the calibration fills the bar between its stage and the end
                stage_state[2](stage_state[0] * total_steps + done, stage_state[1] * total_steps)

        result = ensemble_kalman_inversion(
            forward,
            target,
            gamma,
            prior,
            rng=rng,
            positive=positive,
            n_iterations=self.iterations,
            progress=progress,
        )
        theta = result.parameters
        assert result.statistics is not None  # eki records the final statistics
        surrogate, c = build(theta)
        settings = {**surrogate.settings, "method": self.method, **self._extra_settings()}
        provenance = {
            **surrogate.provenance,
            "calibration": {
                "target_statistics": target.tolist(),
                "calibrated_statistics": np.nan_to_num(result.statistics).tolist(),
                "misfit": result.misfit,
                "failed_members": result.failed,
                "lags_samples": list(lags),
            },
        }
        from ergodex.surrogate import Surrogate

        self.surrogate_ = Surrogate(
            surrogate.variables,
            surrogate.terms,
            surrogate.coefficients,
            kind="cubic-stochastic" if self.cubic_damping else "linear-stochastic",
            noise=surrogate.noise,
            transform=surrogate.transform,
            settings=settings,
            provenance=provenance,
        )
        full = expand(theta)
        self.drift_scale_ = full[:n]
        self.noise_scale_ = full[n : 2 * n]
        self.damping_shift_ = full[2 * n : 3 * n] * np.abs(np.diag(self.L_))
        self.parameter_groups_ = groups
        self.cubic_coefficients_ = c
        self.target_statistics_ = target
        self.calibrated_statistics_ = result.statistics
        self.calibration_misfit_ = result.misfit
        self.n_terms_ = int(np.count_nonzero(self.surrogate_.coefficients))

    def _parameter_groups(self, transform, n: int) -> np.ndarray:
        """Which variables share calibrated parameters: with ``homogeneous``, the two modes of a
        Fourier pair (equal variances to round-off under the rotations), else none."""
        groups = np.arange(n)
        variances = getattr(transform, "explained_variance_", None)
        if not self.homogeneous or variances is None or len(variances) != n:
            return groups
        label, i = 0, 0
        while i < n:
            groups[i] = label
            if i + 1 < n and np.isclose(variances[i + 1], variances[i], rtol=1e-8):
                groups[i + 1] = label
                i += 1
            label += 1
            i += 1
        return groups

    def _extra_settings(self) -> dict:
        return {
            "cubic_damping": self.cubic_damping,
            "calibration_lags": list(self.calibration_lags),
            "members": self.members,
            "iterations": self.iterations,
            "simulation_length": self.simulation_length,
            "n_pieces": self.n_pieces,
            "seed": self.seed,
            "homogeneous": self.homogeneous,
        }

    def _damped_surrogate(self, linear, r: np.ndarray, s: np.ndarray, d: np.ndarray, c: np.ndarray):
        """Rows of L scaled by r, Lᵢᵢ shifted by dᵢ|Lᵢᵢ|, noise S Q S, and −cᵢ (xᵢ − μᵢ)³.

        (xᵢ − μᵢ)³ = xᵢ³ − 3μᵢ xᵢ² + 3μᵢ² xᵢ − μᵢ³, so the cubic adds monomials in xᵢ alone.
        """
        from ergodex.surrogate import Surrogate, Term

        n = len(r)
        mu = self.mean_
        L = r[:, None] * self.L_ + np.diag(d * np.abs(np.diag(self.L_)))
        base = np.column_stack([-L @ mu, L])  # terms 1, x₁ … xₙ (as the linear model's)
        terms = list(linear.terms)
        index = {t: k for k, t in enumerate(terms)}
        extra: list[Term] = []
        for i in range(n):
            for power in (2, 3):
                powers = [0] * n
                powers[i] = power
                term = Term("monomial", tuple(powers))
                if term not in index:
                    index[term] = len(terms) + len(extra)
                    extra.append(term)
        terms = terms + extra
        coefficients = np.zeros((n, len(terms)))
        coefficients[:, : base.shape[1]] = base
        constant = index[Term("monomial", (0,) * n)]
        for i in range(n):
            unit = [0] * n
            unit[i] = 1
            coefficients[i, index[Term("monomial", tuple(unit))]] += -3.0 * c[i] * mu[i] ** 2
            coefficients[i, constant] += c[i] * mu[i] ** 3
            for power, factor in ((2, 3.0 * mu[i]), (3, -1.0)):
                powers = [0] * n
                powers[i] = power
                coefficients[i, index[Term("monomial", tuple(powers))]] += factor * c[i]
        noise = s[:, None] * self.noise_covariance_ * s[None, :]
        return Surrogate(
            linear.variables,
            terms,
            coefficients,
            kind="cubic-stochastic",
            noise=noise,
            transform=linear.transform,
            settings=linear.settings,
            provenance=linear.provenance,
        )
