"""Checking a field surrogate on the grid, not only in mode space.

:func:`check_field` runs the usual check (:func:`ergodex.validation.check`) on the mode
amplitudes of the reference, then adds grid rows to the same scorecard. Each grid row follows the
check's rule: a distance between model pieces and reference pieces of equal length (the
*value*), over the mean distance between pairs of reference pieces (the *noise floor*); the row
passes when the ratio is within the tolerance.

===================  ============================================================  ==========
statistic            distance between two pieces                                     rows
===================  ============================================================  ==========
``variance map``     area-weighted RMS difference of the grid-point variance maps  one
``lag-1 map``        area-weighted RMS difference of the lag-one autocorrelation    one
``histogram``        Wasserstein-1 distance of the area mean (and box means)        per series
``autocorrelation``  RMS difference of the autocorrelation up to the check's lag    per series
``spectrum``         L1 difference of Welch spectra over their mean total power     per series
``variance captured``  |share captured in the piece − share on the fit data|        one
===================  ============================================================  ==========

The reference side of the map and mean rows is the reference's anomalies *as the kept modes
carry them* (projected and mapped back), so these rows test the dynamics on the grid; what the
truncation loses is the ``variance captured`` row, whose value is the share of each check piece's
area-weighted variance that the model's modes capture, compared with the share on the fit data.
Model pieces come from an ensemble of their own, started from reference states drawn with the
check's seed. Grid rows compare single pieces (no pooling) cut end to end from each reference
run (no gap between them), and use the check's tolerance, which was calibrated on the mode-space
rows; their own calibration is still to be measured.

A passed check is evidence, not a certification: defer to the applicable codes, standards and
licensed practice.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ergodex import stats
from ergodex.exceptions import DataError
from ergodex.fields.reading import Box, Field
from ergodex.fields.transform import FieldModes, modes_series

__all__ = ["FieldCheck", "check_field", "grid_rows"]


@dataclass
class FieldCheck:
    """A check result with its grid rows merged in, and the maps the report draws."""

    result: Any  # ergodex.validation.CheckResult
    maps: dict[str, np.ndarray] = field(default_factory=dict)  # name -> (n_lat, n_lon)
    lat: np.ndarray | None = None
    lon: np.ndarray | None = None
    mask: np.ndarray | None = None
    summary: dict = field(default_factory=dict)

    @property
    def scorecard(self):
        return self.result.scorecard

    def report_sections(self) -> list:
        """Extra report sections (the maps) for :func:`ergodex.report.render_report`."""
        from ergodex.fields.maps import map_section

        return [map_section(self)]


def _weighted_rms(a: np.ndarray, b: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Area-weighted RMS difference over the last axis."""
    return np.sqrt(np.sum(w * (a - b) ** 2, axis=-1) / np.sum(w))


def _lag1(x: np.ndarray) -> np.ndarray:
    """Lag-one autocorrelation of each column of x (..., L, p)."""
    d = x - x.mean(axis=-2, keepdims=True)
    num = np.sum(d[..., 1:, :] * d[..., :-1, :], axis=-2)
    den = np.sum(d * d, axis=-2)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(den > 0, num / den, 0.0)


class _Pieces:
    """Per-piece grid statistics: variance and lag-1 maps, mean series statistics."""

    def __init__(self, anomalies: np.ndarray, weights: np.ndarray, boxes: np.ndarray, ctx: dict):
        # anomalies (P, L, p); boxes (n_series, p) weights of each mean series
        self.var = anomalies.var(axis=1)
        self.lag1 = _lag1(anomalies)
        means = np.einsum("plx,sx->pls", anomalies, boxes)  # (P, L, n_series)
        L = means.shape[1]
        k = min(L, 2000)
        idx = np.minimum(np.ceil((np.arange(k) + 0.5) / k * L).astype(int) - 1, L - 1)
        self.qf = np.sort(means, axis=1)[:, idx, :]
        lags = ctx["max_lag"]
        acf = [stats.autocorrelation(means[i], lags) for i in range(means.shape[0])]
        self.acf = np.stack([np.atleast_2d(a.reshape(lags + 1, -1)) for a in acf])
        _, psd = stats.welch_psd(
            np.ascontiguousarray(means.transpose(0, 2, 1)), ctx["dt"], ctx["nperseg"]
        )
        self.psd = psd.transpose(0, 2, 1)


def _distance(name: str, a: _Pieces, i: int, b: _Pieces, j: int, w: np.ndarray) -> np.ndarray:
    if name == "variance map":
        return np.atleast_1d(_weighted_rms(a.var[i], b.var[j], w))
    if name == "lag-1 map":
        return np.atleast_1d(_weighted_rms(a.lag1[i], b.lag1[j], w))
    if name == "histogram":
        return np.mean(np.abs(a.qf[i] - b.qf[j]), axis=0)
    if name == "autocorrelation":
        return np.sqrt(np.mean((a.acf[i, 1:] - b.acf[j, 1:]) ** 2, axis=0))
    x, y = a.psd[i], b.psd[j]
    return np.sum(np.abs(x - y), axis=0) / (0.5 * np.sum(x + y, axis=0))


def _cut(runs: list[np.ndarray], length: int) -> np.ndarray:
    pieces = [r[s : s + length] for r in runs for s in range(0, r.shape[0] - length + 1, length)]
    if len(pieces) < 2:
        raise DataError(
            f"the reference gives {len(pieces)} piece(s) of {length} samples; the "
            f"grid rows need at least 2: supply more or longer runs"
        )
    return np.stack(pieces)


def grid_rows(
    transform: FieldModes,
    reference_modes: list[np.ndarray],
    reference_anomalies: list[np.ndarray],
    model_modes: list[np.ndarray],
    *,
    piece_length: int,
    max_lag: int,
    dt: float,
    nperseg: int,
    boxes: dict[str, np.ndarray],
    tolerance: float,
) -> tuple[list, dict]:
    """Grid rows (ScoreRow) and maps from mode amplitudes of reference and model runs.

    ``reference_anomalies`` are the full-grid anomalies of the reference runs (for the
    ``variance captured`` row); ``boxes`` maps a series name to per-point weights (area mean,
    box means).
    """
    from ergodex.validation import ScoreRow
    from ergodex.validation.verdict import _ratio

    w = transform.area_
    names = list(boxes)
    box_w = np.stack([boxes[n] for n in names])
    ctx = {"max_lag": max_lag, "dt": dt, "nperseg": nperseg}
    ref_z = _cut(reference_modes, piece_length)
    mod_z = _cut(model_modes, piece_length) if model_modes else np.zeros((0,) + ref_z.shape[1:])
    ref = _Pieces(np.stack([transform.reconstruct(z) for z in ref_z]), w, box_w, ctx)
    rows, n_ref = [], ref_z.shape[0]
    floor_pairs = [(i, j) for i in range(n_ref) for j in range(i + 1, n_ref)]
    mod = None
    if mod_z.shape[0]:
        mod = _Pieces(np.stack([transform.reconstruct(z) for z in mod_z]), w, box_w, ctx)
    for stat in ("variance map", "lag-1 map", "histogram", "autocorrelation", "spectrum"):
        labels = ["grid"] if stat.endswith("map") else names
        floor = np.mean([_distance(stat, ref, i, ref, j, w) for i, j in floor_pairs], axis=0)
        if mod is None:
            value = np.full(len(labels), np.nan)
        else:
            value = np.mean(
                [
                    _distance(stat, mod, i, ref, j, w)
                    for i in range(mod_z.shape[0])
                    for j in range(n_ref)
                ],
                axis=0,
            )
        for label, v, f in zip(labels, value, floor):
            ratio = _ratio(float(v), float(f))
            rows.append(
                ScoreRow(
                    stat if stat.endswith("map") else f"{stat} ({label})",
                    transform.variable_ if stat.endswith("map") else label,
                    float(v),
                    float(f),
                    ratio,
                    tolerance,
                    "pass" if ratio <= tolerance else "fail",
                )
            )
    # variance captured: the modes' share of each reference piece's area-weighted variance
    full = _cut(reference_anomalies, piece_length)
    total = np.array([np.sum(w * p.var(axis=0)) for p in full])
    kept = np.array([np.sum(w * transform.reconstruct(z).var(axis=0)) for z in ref_z])
    share = kept / total
    fit_share = float(np.sum(transform.variance_fraction_))
    floor = float(np.mean([abs(share[i] - share[j]) for i, j in floor_pairs]))
    captured = float(np.mean(np.abs(share - fit_share)))
    ratio = _ratio(captured, floor)
    rows.append(
        ScoreRow(
            "variance captured",
            f"modes 1-{transform.n_modes_}",
            captured,
            floor,
            ratio,
            tolerance,
            "pass" if ratio <= tolerance else "fail",
        )
    )
    maps = {"reference variance": ref.var.mean(axis=0), "reference lag-1": ref.lag1.mean(axis=0)}
    if mod is not None:
        maps["surrogate variance"] = mod.var.mean(axis=0)
        maps["surrogate lag-1"] = mod.lag1.mean(axis=0)
    info = {
        "variance_captured_fit": fit_share,
        "variance_captured_check": float(share.mean()),
        "grid_reference_pieces": int(n_ref),
        "grid_model_pieces": int(mod_z.shape[0]),
        "grid_series": names,
    }
    return rows, {"maps": maps, "info": info}


def _box_weights(transform: FieldModes, regions: list[Box]) -> dict[str, np.ndarray]:
    """Per-point weights of the area mean and of each box mean (summing to one)."""
    w = transform.area_
    out = {"area mean": w / w.sum()}
    lat2, lon2 = np.meshgrid(transform.lat_, transform.lon_, indexing="ij")
    plat, plon = lat2[transform.mask_], lon2[transform.mask_]
    for box in regions:
        inside = np.zeros(plat.size, bool)
        inside[
            np.isin(plat, transform.lat_[box.lat_index(transform.lat_)])
            & np.isin(plon, transform.lon_[box.lon_index(transform.lon_)])
        ] = True
        label = "box " + ",".join(f"{v:g}" for v in box.to_list())
        if not inside.any():
            raise DataError(
                f"--region {box.to_list()}: no valid grid point of variable "
                f"{transform.variable_!r} lies in this box"
            )
        bw = np.where(inside, w, 0.0)
        out[label] = bw / bw.sum()
    return out


def check_field(
    surrogate,
    reference: Field,
    spec=None,
    *,
    regions: Sequence[Box] = (),
    time_limit: float | None = None,
    max_memory: int | str | None = None,
) -> FieldCheck:
    """Check a field surrogate on the reference field: mode rows plus grid rows, one verdict.

    Parameters
    ----------
    surrogate : Surrogate
        A model whose transform is :class:`FieldModes`.
    reference : Field
        Reference data read like the fit data (same variable, grid and box).
    spec : CheckSpec, optional
    regions : list of Box
        Boxes whose mean series get histogram, autocorrelation and spectrum rows.
    time_limit : float, optional
        Wall-clock seconds for the whole check, both ensembles together (as for
        :func:`ergodex.validation.check`); over it :class:`ModelLimitError` (a model failure).
    max_memory : int or str, optional
        Memory limit (``"2GB"``) for each ensemble and for the grid pieces of the grid rows;
        over it :class:`SettingsError` before the work starts.
    """
    import time

    from ergodex.integrate import blowup_bound, integrate_ensemble
    from ergodex.limits import check_memory
    from ergodex.surrogate import Surrogate
    from ergodex.validation import CheckSpec, check

    transform = surrogate.transform
    if not isinstance(transform, FieldModes):
        raise DataError("check_field needs a model fitted on a gridded field (field-modes)")
    spec = CheckSpec() if spec is None else spec
    reference = reference.loaded()
    modes = modes_series(transform, reference)
    # the mode-space check runs on the model without its transform: the reference is already
    # in model space (the grid → modes map has been applied with the right dates)
    bare = Surrogate(
        surrogate.variables,
        surrogate.terms,
        surrogate.coefficients,
        kind=surrogate.kind,
        noise=surrogate.noise,
        settings=surrogate.settings,
        provenance=surrogate.provenance,
    )
    started = time.monotonic()
    result = check(bare, modes, spec, time_limit=time_limit, max_memory=max_memory)
    card = result.scorecard
    card.model_fingerprint = surrogate.fingerprint()
    st = card.settings
    L = int(st["piece_length_samples"])
    dt = float(st["dt"])
    # an ensemble of its own for the grid rows, seeded from the check's seed
    rng = np.random.default_rng([spec.seed, 17])
    stacked = modes.stacked()
    starts = stacked[rng.choice(stacked.shape[0], size=spec.members, replace=True)]
    n_out = max(L, round(float(st["member_length"]) / dt))
    # grid pieces of reference and model, each a stack and its reconstruction (two copies)
    n_pieces = sum(n // L for n in modes.lengths) + spec.members * (n_out // L)
    check_memory(
        2.0 * 8 * n_pieces * L * transform.area_.size,
        f"the grid rows ({n_pieces} pieces x {L} samples x {transform.area_.size} grid points)",
        "use fewer members, a smaller --box or a shorter record",
        max_memory,
    )
    remaining = None
    if time_limit is not None:
        # what the mode-space check left of the limit (a sliver, not zero, when it used it all:
        # the grid ensemble then stops at its first check of the clock)
        remaining = max(float(time_limit) - (time.monotonic() - started), 1e-3)
    run = integrate_ensemble(
        surrogate,
        starts,
        dt_out=dt,
        n_out=n_out,
        spinup=float(st["spinup"]),
        bound=blowup_bound(stacked, factor=10.0),
        seed=int(rng.integers(2**31)),
        time_limit=remaining,
        max_memory=max_memory,
    )
    alive = [run.states[m] for m in range(spec.members) if not run.blown_up[m]]
    steps = transform.clock_.steps_of(
        reference.clock.dates_at(reference.steps), where=reference.source
    )
    anomalies = [
        transform.anomalies_at(reference.values[m], steps) for m in range(reference.n_members)
    ]
    rows, extra = grid_rows(
        transform,
        list(modes.runs),
        anomalies,
        alive,
        piece_length=L,
        max_lag=int(st["max_lag_samples"]),
        dt=dt,
        nperseg=int(min(st["nperseg"], L)),
        boxes=_box_weights(transform, list(regions)),
        # the threshold the mode rows were held to (derived for them; at least the floor)
        tolerance=float(card.threshold.get("threshold", spec.tolerance)),
    )
    card.rows.extend(rows)
    failing = sorted(
        (r for r in rows if r.verdict == "fail"),
        key=lambda r: -r.ratio if not math.isnan(r.ratio) else 0.0,
    )
    for r in failing:
        card.reasons.append(
            f"{r.statistic} of {r.variable} on the grid: distance "
            f"{r.ratio:.3g}× the noise floor (tolerance {r.tolerance:g})"
        )
    if failing:
        card.verdict = "fail"
    card.settings["grid"] = {
        **extra["info"],
        "time_unit": transform.clock_.unit,
        "calendar": transform.clock_.calendar,
        "dt_text": transform.dt_text,
        "area_weights": transform.area_source_,
        "members_for_grid_rows": len(alive),
    }
    summary = transform.summary()
    return FieldCheck(
        result=result,
        maps=extra["maps"],
        lat=transform.lat_,
        lon=transform.lon_,
        mask=transform.mask_,
        summary=summary,
    )
