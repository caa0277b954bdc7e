"""Long-run statistics of time series and the distances between them.

Every function here is pure: arrays in, arrays out, no files, no global state. They are the
building blocks of :mod:`ergodex.validation`, and usable on their own.

Conventions
-----------
- A *sample* ``x`` is either one array ``(n_samples,)`` / ``(n_samples, n_variables)`` or, where a
  function says so, a list of such arrays (separate runs of the same system). Functions that work
  per variable return one value per column.
- Histograms carry two extra bins: mass below the first edge (index 0) and above the last edge
  (index -1), so that a model drifting outside the reference's range is never hidden.
- Times are in the units of ``dt``.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from ergodex.exceptions import DataError, SettingsError

__all__ = [
    "DEFAULT_BINS",
    "DEFAULT_QUANTILES",
    "autocorrelation",
    "effective_sample_size",
    "exceedance_rate",
    "fast_fft_length",
    "hellinger",
    "histogram",
    "histogram_edges",
    "integrated_autocorrelation_time",
    "joint_histogram",
    "ks_distance",
    "power_spectrum",
    "welch_psd",
    "quantile_function",
    "quantiles",
    "wasserstein1",
    "wasserstein1_histogram",
]

#: Default number of histogram bins between the reference's extremes.
DEFAULT_BINS = 35
#: Default lower and upper quantile levels reported for extremes.
DEFAULT_QUANTILES = (0.01, 0.99, 0.999)
# Freedman–Diaconis can ask for tens of thousands of bins on long, narrow data; more than this
# many bins carry no extra information for a marginal and make figures unreadable.
_MAX_FD_BINS = 200


def _as_runs(x) -> list[np.ndarray]:
    """A list of 2-D float arrays from one array or a list of runs (1-D becomes one column)."""
    if isinstance(x, np.ndarray) or not isinstance(x, (list, tuple)):
        runs = [np.asarray(x, dtype=float)]
    else:
        runs = [np.asarray(r, dtype=float) for r in x]
    out = []
    for r in runs:
        if r.ndim == 1:
            r = r[:, None]
        if r.ndim != 2:
            raise DataError(
                f"a run must be 1-D or 2-D (n_samples, n_variables); got shape {r.shape}"
            )
        out.append(r)
    if not out:
        raise DataError("no runs given")
    n_vars = {r.shape[1] for r in out}
    if len(n_vars) != 1:
        raise DataError(f"runs have different numbers of variables: {sorted(n_vars)}")
    return out


def _is_1d(x) -> bool:
    """True when x is one 1-D run or a list of 1-D runs (results then drop the variable axis)."""
    if isinstance(x, (list, tuple)):
        return len(x) > 0 and all(np.ndim(r) == 1 for r in x)
    return np.ndim(x) == 1


def _finite_1d(x, what: str) -> np.ndarray:
    a = np.asarray(x, dtype=float).ravel()
    a = a[np.isfinite(a)]
    if a.size == 0:
        raise DataError(f"{what} has no finite values")
    return a


# ---------------------------------------------------------------------------------------------
# Histograms
# ---------------------------------------------------------------------------------------------


def histogram_edges(x, bins: int | str = DEFAULT_BINS) -> np.ndarray:
    """Bin edges for one variable, taken from the reference sample.

    Parameters
    ----------
    x : array_like, shape (n_samples,)
        Reference values (non-finite values are ignored).
    bins : int or {"fd"}, default 35
        Number of equal-width bins between the reference minimum and maximum, or ``"fd"`` for the
        Freedman–Diaconis width ``2 IQR n^(-1/3)`` (capped at 200 bins).

    Returns
    -------
    edges : ndarray, shape (n_bins + 1,)
        Increasing edges; the first is the reference minimum, the last its maximum.

    References
    ----------
    .. [1] D. Freedman and P. Diaconis, "On the histogram as a density estimator: L2 theory",
       Z. Wahrscheinlichkeitstheorie verw. Gebiete 57, 453–476 (1981).
    """
    a = _finite_1d(x, "histogram reference")
    lo, hi = float(a.min()), float(a.max())
    if hi <= lo:
        raise DataError(f"histogram reference is constant (value {lo}); a histogram needs spread")
    if isinstance(bins, str):
        if bins != "fd":
            raise SettingsError(f"bins must be a positive integer or 'fd'; got {bins!r}")
        q75, q25 = np.percentile(a, [75, 25])
        width = 2.0 * (q75 - q25) * a.size ** (-1.0 / 3.0)
        n_bins = (
            int(np.clip(np.ceil((hi - lo) / width), 1, _MAX_FD_BINS)) if width > 0 else DEFAULT_BINS
        )
    else:
        if isinstance(bins, bool) or int(bins) != bins or int(bins) < 1:
            raise SettingsError(f"bins must be a positive integer or 'fd'; got {bins!r}")
        n_bins = int(bins)
    return np.linspace(lo, hi, n_bins + 1)


def histogram(x, edges) -> np.ndarray:
    """Probability mass per bin, with underflow and overflow bins.

    Parameters
    ----------
    x : array_like, shape (n_samples,)
        Values; non-finite values are ignored.
    edges : array_like, shape (n_bins + 1,)
        Increasing bin edges (usually from :func:`histogram_edges` on the reference).

    Returns
    -------
    mass : ndarray, shape (n_bins + 2,)
        ``mass[0]`` is the fraction below ``edges[0]``, ``mass[-1]`` the fraction above
        ``edges[-1]``, the rest the fractions in each bin (the last bin includes its right edge).
        Sums to 1; all zeros when ``x`` has no finite value.
    """
    a = np.asarray(x, dtype=float).ravel()
    a = a[np.isfinite(a)]
    edges = np.asarray(edges, dtype=float)
    out = np.zeros(edges.size + 1)
    if a.size == 0:
        return out
    # searchsorted(side="right") puts x == edges[0] into bin 1 and x > edges[-1] into the overflow
    idx = np.searchsorted(edges, a, side="right")
    idx[a == edges[-1]] = edges.size - 1  # right edge belongs to the last bin
    counts = np.bincount(idx, minlength=edges.size + 1)
    return counts / a.size


def joint_histogram(x, y, edges_x, edges_y) -> np.ndarray:
    """Joint probability mass of a pair of variables, with underflow/overflow rows and columns.

    Parameters
    ----------
    x, y : array_like, shape (n_samples,)
        Paired values; a pair with any non-finite member is ignored.
    edges_x, edges_y : array_like
        Bin edges as from :func:`histogram_edges`.

    Returns
    -------
    mass : ndarray, shape (len(edges_x) + 1, len(edges_y) + 1)
        Index 0 and -1 along each axis hold the mass below / above the edges. Sums to 1.
    """
    x = np.asarray(x, dtype=float).ravel()
    y = np.asarray(y, dtype=float).ravel()
    if x.shape != y.shape:
        raise DataError(f"x and y must have the same length; got {x.size} and {y.size}")
    ok = np.isfinite(x) & np.isfinite(y)
    x, y = x[ok], y[ok]
    ex, ey = np.asarray(edges_x, float), np.asarray(edges_y, float)
    out = np.zeros((ex.size + 1, ey.size + 1))
    if x.size == 0:
        return out
    ix = np.searchsorted(ex, x, side="right")
    ix[x == ex[-1]] = ex.size - 1
    iy = np.searchsorted(ey, y, side="right")
    iy[y == ey[-1]] = ey.size - 1
    np.add.at(out, (ix, iy), 1.0)
    return out / x.size


# ---------------------------------------------------------------------------------------------
# Distances between distributions
# ---------------------------------------------------------------------------------------------


def quantile_function(x, n_points: int) -> np.ndarray:
    """Empirical quantile function at the midpoints ``(k + 1/2) / n_points``.

    With ``n_points`` equal to the sample size this is exactly the sorted sample, which makes
    :func:`wasserstein1` between equal-sized samples exact; with fewer points it is the
    inverse-CDF value at each midpoint (no interpolation), an approximation whose error is below
    the sampling noise once ``n_points`` is in the hundreds.
    """
    a = np.sort(_finite_1d(x, "sample"))
    p = (np.arange(n_points) + 0.5) / n_points
    # inverted CDF: smallest order statistic whose empirical CDF reaches p
    idx = np.minimum(np.ceil(p * a.size).astype(int) - 1, a.size - 1)
    return a[np.maximum(idx, 0)]


def wasserstein1(u, v) -> float:
    """Wasserstein-1 (earth mover's) distance between two one-dimensional samples.

    Computed exactly as the area between the two empirical CDFs,
    ``W1 = ∫ |F_u(t) − F_v(t)| dt``. Non-finite values are ignored.

    Parameters
    ----------
    u, v : array_like, shape (n,), (m,)

    Returns
    -------
    float
        In the units of the data.

    References
    ----------
    .. [1] L. V. Kantorovich, "On the translocation of masses", Dokl. Akad. Nauk SSSR 37 (1942).
    .. [2] C. Villani, *Optimal Transport: Old and New*, Springer (2009), ch. 6 (the 1-D CDF form).
    """
    a = np.sort(_finite_1d(u, "first sample"))
    b = np.sort(_finite_1d(v, "second sample"))
    grid = np.concatenate([a, b])
    grid.sort(kind="mergesort")
    widths = np.diff(grid)
    fa = np.searchsorted(a, grid[:-1], side="right") / a.size
    fb = np.searchsorted(b, grid[:-1], side="right") / b.size
    return float(np.sum(np.abs(fa - fb) * widths))


def wasserstein1_histogram(p, q, edges) -> float:
    """Wasserstein-1 distance between two histograms on the same edges.

    Mass in a bin is treated as sitting at the bin centre; underflow mass at the first edge and
    overflow mass at the last edge (so it is a lower bound for mass outside the range).

    Parameters
    ----------
    p, q : array_like, shape (n_bins + 2,)
        Masses as returned by :func:`histogram`.
    edges : array_like, shape (n_bins + 1,)

    References
    ----------
    .. [1] C. Villani, *Optimal Transport: Old and New*, Springer (2009), ch. 6.
    """
    edges = np.asarray(edges, float)
    p = np.asarray(p, float)
    q = np.asarray(q, float)
    if p.shape != (edges.size + 1,) or q.shape != p.shape:
        raise DataError(
            f"histograms must have {edges.size + 1} entries for {edges.size} edges; "
            f"got {p.shape} and {q.shape}"
        )
    support = np.concatenate([[edges[0]], 0.5 * (edges[1:] + edges[:-1]), [edges[-1]]])
    cdf_gap = np.cumsum(p - q)[:-1]
    return float(np.sum(np.abs(cdf_gap) * np.diff(support)))


def hellinger(p, q) -> float:
    """Hellinger distance between two discrete distributions (e.g. histograms).

    ``H = sqrt(1 − Σ sqrt(p_i q_i))``, between 0 (identical) and 1 (disjoint supports). Inputs are
    normalised to sum to 1 first.

    References
    ----------
    .. [1] E. Hellinger, "Neue Begründung der Theorie quadratischer Formen von unendlichvielen
       Veränderlichen", J. reine angew. Math. 136, 210–271 (1909).
    """
    p = np.asarray(p, float)
    q = np.asarray(q, float)
    if p.shape != q.shape:
        raise DataError(f"distributions must have the same shape; got {p.shape} and {q.shape}")
    sp, sq = p.sum(), q.sum()
    if sp <= 0 or sq <= 0 or np.any(p < 0) or np.any(q < 0):
        raise DataError("distributions must be non-negative with positive total mass")
    bc = np.sum(np.sqrt((p / sp) * (q / sq)))
    return float(np.sqrt(max(0.0, 1.0 - bc)))


def ks_distance(u, v) -> float:
    """Kolmogorov–Smirnov distance: the largest gap between two empirical CDFs.

    Non-finite values are ignored. Equals the statistic of ``scipy.stats.ks_2samp``.

    References
    ----------
    .. [1] N. Smirnov, "Table for estimating the goodness of fit of empirical distributions",
       Ann. Math. Statist. 19, 279–281 (1948).
    """
    a = np.sort(_finite_1d(u, "first sample"))
    b = np.sort(_finite_1d(v, "second sample"))
    grid = np.concatenate([a, b])
    fa = np.searchsorted(a, grid, side="right") / a.size
    fb = np.searchsorted(b, grid, side="right") / b.size
    return float(np.max(np.abs(fa - fb)))


# ---------------------------------------------------------------------------------------------
# Autocorrelation
# ---------------------------------------------------------------------------------------------


def fast_fft_length(n: int) -> int:
    """The smallest length ≥ ``n`` whose only prime factors are 2, 3 and 5.

    Zero-padding an FFT to such a length keeps it fast (numpy's pocketfft has radix-2, 3 and 5
    passes); written here so that the statistics need not import ``scipy.fft`` (about half a
    second at start-up) for this one helper. Same values as ``scipy.fft.next_fast_len(n,
    real=True)``.
    """
    n = int(n)
    if n <= 6:
        return max(n, 1)
    best = 1 << (n - 1).bit_length()  # the next power of two always qualifies
    p5 = 1
    while p5 < best:
        p35 = p5
        while p35 < best:
            # smallest power of two lifting p35 to at least n
            q = -(-n // p35)
            candidate = p35 * (1 << (q - 1).bit_length())
            best = min(best, candidate)
            p35 *= 3
        p5 *= 5
    return best


def autocorrelation(x, max_lag: int | None = None, *, mean: np.ndarray | None = None) -> np.ndarray:
    """Normalised autocorrelation function per variable, computed by FFT.

    The estimator is the usual biased one (sum of lagged products divided by the number of
    samples, then by the lag-0 value), which is what ``statsmodels.tsa.stattools.acf`` returns by
    default and which gives a positive semi-definite sequence. Several runs are pooled: products
    are summed within each run only (never across the boundary between runs) and the mean is
    the pooled mean of all runs, since the runs sample the same stationary process.

    Parameters
    ----------
    x : array_like or list of array_like
        One run ``(n_samples,)`` / ``(n_samples, n_variables)`` or a list of runs.
    max_lag : int, optional
        Largest lag in samples; default: the shortest run's length minus one.
    mean : ndarray, shape (n_variables,), optional
        Mean to remove; default: the pooled sample mean.

    Returns
    -------
    acf : ndarray, shape (max_lag + 1,) for 1-D input, else (max_lag + 1, n_variables)
        ``acf[0] == 1``.

    References
    ----------
    .. [1] G. E. P. Box, G. M. Jenkins and G. C. Reinsel, *Time Series Analysis*, 4th ed., Wiley
       (2008), §2.1.5 (the estimator).
    .. [2] J. W. Cooley and J. W. Tukey, "An algorithm for the machine calculation of complex
       Fourier series", Math. Comp. 19, 297–301 (1965) (the FFT).
    """
    one_d = _is_1d(x)
    runs = _as_runs(x)
    for r in runs:
        if not np.all(np.isfinite(r)):
            raise DataError("autocorrelation needs finite values; drop blown-up runs first")
    shortest = min(r.shape[0] for r in runs)
    if max_lag is None:
        max_lag = shortest - 1
    max_lag = int(max_lag)
    if max_lag < 0 or max_lag >= shortest:
        raise SettingsError(
            f"max_lag must be in [0, {shortest - 1}] for runs of {shortest} samples; got {max_lag}"
        )
    n_total = sum(r.shape[0] for r in runs)
    mu = np.asarray(mean, float) if mean is not None else sum(r.sum(axis=0) for r in runs) / n_total
    acov = np.zeros((max_lag + 1, runs[0].shape[1]))
    for r in runs:
        d = np.ascontiguousarray((r - mu).T)  # FFT along a contiguous axis is several times faster
        n = d.shape[1]
        # zero padding to n + max_lag keeps lags up to max_lag free of circular wrap-around
        nfft = fast_fft_length(n + max_lag)
        f = np.fft.rfft(d, n=nfft, axis=1)
        acov += np.fft.irfft(f.real**2 + f.imag**2, n=nfft, axis=1)[:, : max_lag + 1].T
    acov /= n_total
    if np.any(acov[0] <= 0):
        raise DataError("autocorrelation of a constant variable is undefined")
    acf = acov / acov[0]
    return acf[:, 0] if one_d else acf


def _sokal_tau(acf_1d: np.ndarray, c: float) -> tuple[float, int]:
    """Integrated time in samples (Sokal convention 1 + 2 Σ ρ) and the window used."""
    partial = 1.0 + 2.0 * np.cumsum(acf_1d[1:])
    lags = np.arange(1, acf_1d.size)
    ok = lags >= c * partial
    if not np.any(ok):
        return float(partial[-1]), int(lags[-1])
    w = int(np.argmax(ok))
    return float(partial[w]), int(lags[w])


def integrated_autocorrelation_time(x, dt: float = 1.0, *, c: float = 5.0) -> float | np.ndarray:
    """Integrated autocorrelation time per variable, with Sokal's automatic window.

    ``tau = dt * (1/2 + Σ_{k=1}^{W} ρ_k)``, the trapezoid-rule value of ``∫_0^∞ ρ(t) dt``; for an
    Ornstein–Uhlenbeck process with ``ρ(t) = exp(−θ t)`` this is ``1/θ``. The sum is cut at the
    smallest window ``W`` with ``W ≥ c · (1 + 2 Σ_{k≤W} ρ_k)`` (in samples): beyond it the sum adds
    mostly noise. ``c = 5`` is Sokal's recommendation for nearly exponential decay; raise it for
    slowly oscillating correlations.

    Parameters
    ----------
    x : array_like or list of array_like
        One run or several runs (see :func:`autocorrelation`).
    dt : float, default 1
        Sampling interval; the result is in the same time units.
    c : float, default 5

    Returns
    -------
    tau : ndarray, shape (n_variables,) (a float for 1-D input)

    References
    ----------
    .. [1] A. D. Sokal, "Monte Carlo methods in statistical mechanics: foundations and new
       algorithms", in *Functional Integration*, Plenum (1997), §3 (the automatic window).
    .. [2] N. Madras and A. D. Sokal, "The pivot algorithm", J. Stat. Phys. 50, 109–186 (1988).
    """
    one_d = _is_1d(x)
    acf = autocorrelation(x)
    if acf.ndim == 1:
        acf = acf[:, None]
    taus = np.array([_sokal_tau(acf[:, j], c)[0] for j in range(acf.shape[1])])
    # Sokal's 1 + 2Σρ is in samples and counts both sides; halve it for ∫_0^∞ ρ in time units
    out = 0.5 * taus * dt
    return float(out[0]) if one_d else out


def effective_sample_size(x, *, c: float = 5.0) -> float | np.ndarray:
    """Number of effectively independent samples per variable: ``n / (1 + 2 Σ ρ_k)``.

    Uses the same automatic window as :func:`integrated_autocorrelation_time`; several runs add
    up their samples.

    References
    ----------
    .. [1] A. D. Sokal (1997), see :func:`integrated_autocorrelation_time`.
    """
    one_d = _is_1d(x)
    n = sum(r.shape[0] for r in _as_runs(x))
    tau_time = np.atleast_1d(integrated_autocorrelation_time(x, 1.0, c=c))
    out = n / np.maximum(2.0 * tau_time, 1e-12)
    return float(out[0]) if one_d else out


# ---------------------------------------------------------------------------------------------
# Spectra, quantiles, extremes
# ---------------------------------------------------------------------------------------------


def welch_psd(x, dt: float, nperseg: int) -> tuple[np.ndarray, np.ndarray]:
    """Welch power spectral density along the last axis (Hann window, half overlap, mean removed).

    Vectorised over every leading axis, and equal to ``scipy.signal.welch(x, fs=1/dt,
    nperseg=nperseg, axis=-1)`` with its defaults (periodic Hann window, 50 % overlap, constant
    detrending, one-sided density, mean over segments).

    Parameters
    ----------
    x : ndarray, shape (..., n_samples)
    dt : float
    nperseg : int
        Segment length, at most ``n_samples``.

    Returns
    -------
    freq : ndarray, shape (nperseg // 2 + 1,)
    psd : ndarray, shape (..., nperseg // 2 + 1)

    References
    ----------
    .. [1] P. D. Welch, "The use of fast Fourier transform for the estimation of power spectra",
       IEEE Trans. Audio Electroacoust. 15, 70–73 (1967).
    """
    x = np.asarray(x, float)
    n = x.shape[-1]
    nperseg = int(nperseg)
    if not 2 <= nperseg <= n:
        raise SettingsError(f"nperseg must be in [2, {n}]; got {nperseg}")
    step = nperseg - nperseg // 2
    segs = np.lib.stride_tricks.sliding_window_view(x, nperseg, axis=-1)[..., ::step, :]
    segs = segs - segs.mean(axis=-1, keepdims=True)
    window = 0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(nperseg) / nperseg)  # periodic Hann
    spec = np.abs(np.fft.rfft(segs * window, axis=-1)) ** 2
    spec *= dt / np.sum(window**2)
    # one-sided: double every bin except DC (and Nyquist for an even segment length)
    if nperseg % 2 == 0:
        spec[..., 1:-1] *= 2.0
    else:
        spec[..., 1:] *= 2.0
    return np.fft.rfftfreq(nperseg, dt), spec.mean(axis=-2)


def power_spectrum(x, dt: float, *, nperseg: int = 256) -> tuple[np.ndarray, np.ndarray]:
    """One-sided power spectral density per variable by Welch's method.

    Each run is split into half-overlapping Hann-windowed segments of ``nperseg`` samples with the
    mean removed (as ``scipy.signal.welch``, see :func:`welch_psd`); several runs are averaged
    with weights proportional to their number of segments.

    Parameters
    ----------
    x : array_like or list of array_like
    dt : float
        Sampling interval; frequencies come out in cycles per time unit.
    nperseg : int, default 256
        Segment length; cut down to the shortest run's length.

    Returns
    -------
    freq : ndarray, shape (n_freq,)
    psd : ndarray, shape (n_freq,) for 1-D input, else (n_freq, n_variables)
        Variance per unit frequency; ``∫ psd df`` ≈ the variance.

    References
    ----------
    .. [1] P. D. Welch, "The use of fast Fourier transform for the estimation of power spectra",
       IEEE Trans. Audio Electroacoust. 15, 70–73 (1967).
    """
    one_d = _is_1d(x)
    runs = _as_runs(x)
    nper = int(min(nperseg, min(r.shape[0] for r in runs)))
    if nper < 4:
        raise DataError(f"runs of {nper} samples are too short for a spectrum")
    total: np.ndarray | None = None
    freq: np.ndarray | None = None
    weight = 0.0
    step = nper - nper // 2
    for r in runs:
        if not np.all(np.isfinite(r)):
            raise DataError("power_spectrum needs finite values; drop blown-up runs first")
        freq, p = welch_psd(np.ascontiguousarray(r.T), dt, nper)
        n_seg = (r.shape[0] - nper) // step + 1
        total = p.T * n_seg if total is None else total + p.T * n_seg
        weight += n_seg
    assert total is not None and freq is not None  # there is at least one run
    psd = total / weight
    return freq, (psd[:, 0] if one_d else psd)


def quantiles(x, levels: Sequence[float] = DEFAULT_QUANTILES) -> np.ndarray:
    """Sample quantiles per variable (linear interpolation between order statistics).

    Parameters
    ----------
    x : array_like, shape (n_samples,) or (n_samples, n_variables)
        Non-finite values are ignored per variable.
    levels : sequence of float in (0, 1), default (0.01, 0.99, 0.999)

    Returns
    -------
    q : ndarray, shape (n_levels,) or (n_levels, n_variables)

    References
    ----------
    .. [1] R. J. Hyndman and Y. Fan, "Sample quantiles in statistical packages", Amer. Statist.
       50, 361–365 (1996) (definition 7, numpy's default).
    """
    lv = np.asarray(levels, float)
    if np.any((lv <= 0) | (lv >= 1)):
        raise SettingsError(f"quantile levels must lie strictly between 0 and 1; got {list(lv)}")
    a = np.asarray(x, float)
    if a.ndim == 1:
        return np.quantile(_finite_1d(a, "sample"), lv)
    return np.stack(
        [np.quantile(_finite_1d(a[:, j], f"column {j}"), lv) for j in range(a.shape[1])], axis=1
    )


def exceedance_rate(
    x, thresholds, *, dt: float | None = None, below: bool = False
) -> float | np.ndarray:
    """How often each variable lies beyond a threshold (usually a reference quantile).

    Parameters
    ----------
    x : array_like, shape (n_samples,) or (n_samples, n_variables)
    thresholds : array_like, shape () or (n_variables,)
    dt : float, optional
        If given, return up-crossings (or down-crossings with ``below``) per unit time, the
        rate at which new excursions begin; otherwise the fraction of samples beyond.
    below : bool, default False
        Count values below the threshold instead of above.

    Returns
    -------
    rate : ndarray, shape (n_variables,) (a float for 1-D input)
    """
    a = np.asarray(x, float)
    one_d = a.ndim == 1
    if one_d:
        a = a[:, None]
    thr = np.broadcast_to(np.asarray(thresholds, float), (a.shape[1],))
    beyond = a < thr if below else a > thr
    if dt is None:
        counts = beyond.sum(axis=0)
        out = counts / np.maximum(np.isfinite(a).sum(axis=0), 1)
    else:
        if a.shape[0] < 2:
            raise DataError("an excursion rate needs at least two samples")
        starts = (~beyond[:-1]) & beyond[1:]
        out = starts.sum(axis=0) / ((a.shape[0] - 1) * dt)
    return float(out[0]) if one_d else out
