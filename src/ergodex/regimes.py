"""Regimes: named regions of state space, and how a trajectory visits them.

A regime set turns states into integer labels (``-1`` where no regime applies, called ``"none"``);
from the labels come occupancy fractions, residence times and transition matrices — statistics
that a good surrogate must reproduce (how often the loop reverses, how long it circulates one
way).

Kinds of regime (each a small class; a ``kind`` → class table reads them from dictionaries):

- :class:`Ball` — states within ``radius`` of ``centre`` (Euclidean, over the named variables);
- :class:`Threshold` — states where every rule ``variable above/below value`` holds;
- :class:`Cluster` — the cell of a k-means centre: states nearer to it than to any other cluster
  centre of the same set (optionally within ``radius``). :meth:`RegimeSet.fit` learns centres
  from reference data for an unfitted ``kind = "kmeans"`` entry (scikit-learn, seeded).

When regions overlap, the first regime listed wins. The file format (TOML or JSON-shaped
dictionaries) is::

    [[regime]]
    name = "clockwise"
    kind = "ball"
    radius = 6.0
    centre = { flow = 8.5, dT_across = 8.5, dT_up = 27.0 }

    [[regime]]
    name = "fast"
    kind = "threshold"
    rules = [ { variable = "flow", above = 12.0 } ]

    [[regime]]
    name = "c"            # becomes c0, c1, c2 after fitting
    kind = "kmeans"
    clusters = 3
    seed = 0
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ergodex.exceptions import DataError, SettingsError

__all__ = [
    "NONE_LABEL",
    "NONE_NAME",
    "Ball",
    "Cluster",
    "KMeansRule",
    "Regime",
    "RegimeSet",
    "Threshold",
    "mean_residence_times",
    "occupancy",
    "residence_times",
    "transition_matrix",
]

#: Label of a state in no regime.
NONE_LABEL = -1
#: Name shown for :data:`NONE_LABEL`.
NONE_NAME = "none"


def _variable_index(variables: Sequence[str], name: str, regime: str) -> int:
    try:
        return list(variables).index(name)
    except ValueError:
        raise DataError(
            f"regime {regime!r} uses variable {name!r}, which is not among the data's "
            f"variables {list(variables)}"
        ) from None


def _number(value, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise SettingsError(f"{where} must be a finite number; got {value!r}")
    return float(value)


def _name(d: Mapping, where: str) -> str:
    name = d.get("name")
    if not isinstance(name, str) or not name.strip():
        raise SettingsError(f"{where}: key 'name' must be a non-empty string; got {name!r}")
    if name == NONE_NAME:
        raise SettingsError(f"{where}: the name {NONE_NAME!r} is reserved for states in no regime")
    return name


def _centre(d: Mapping, where: str) -> dict[str, float]:
    centre = d.get("centre")
    if not isinstance(centre, Mapping) or not centre:
        raise SettingsError(
            f"{where}: key 'centre' must be a table {{variable = value, ...}}; got {centre!r}"
        )
    return {str(k): _number(v, f"{where}: centre.{k}") for k, v in centre.items()}


class Regime:
    """Base of every regime kind.

    An implementer provides:

    1. ``name`` (a string attribute) and a class attribute ``kind`` (the name used in files);
    2. ``contains(states, variables) -> bool array`` — which states ``(n, n_variables)`` lie in it;
    3. ``to_dict()`` and a classmethod ``from_dict(d, where)`` that raises ``SettingsError``
       naming the offending key.
    """

    kind = ""
    name: str

    def contains(self, states: np.ndarray, variables: Sequence[str]) -> np.ndarray:
        raise NotImplementedError

    def to_dict(self) -> dict:
        raise NotImplementedError

    @classmethod
    def from_dict(cls, d: Mapping, where: str) -> Regime:
        raise NotImplementedError


@dataclass(frozen=True)
class Ball(Regime):
    """States within ``radius`` of ``centre`` (Euclidean distance over the centre's variables)."""

    name: str
    centre: dict[str, float]
    radius: float
    kind = "ball"

    def contains(self, states, variables):
        idx = [_variable_index(variables, v, self.name) for v in self.centre]
        c = np.array(list(self.centre.values()))
        d2 = np.sum((np.asarray(states, float)[:, idx] - c) ** 2, axis=1)
        return d2 <= self.radius**2

    def to_dict(self):
        return {
            "name": self.name,
            "kind": self.kind,
            "centre": dict(self.centre),
            "radius": self.radius,
        }

    @classmethod
    def from_dict(cls, d, where):
        radius = _number(d.get("radius"), f"{where}: key 'radius'")
        if radius <= 0:
            raise SettingsError(f"{where}: key 'radius' must be positive; got {radius}")
        return cls(_name(d, where), _centre(d, where), radius)


@dataclass(frozen=True)
class Threshold(Regime):
    """States where every rule holds; a rule is ``(variable, "above" | "below", value)``."""

    name: str
    rules: tuple[tuple[str, str, float], ...]
    kind = "threshold"

    def contains(self, states, variables):
        states = np.asarray(states, float)
        ok = np.ones(states.shape[0], bool)
        for var, side, value in self.rules:
            col = states[:, _variable_index(variables, var, self.name)]
            ok &= (col > value) if side == "above" else (col < value)
        return ok

    def to_dict(self):
        return {
            "name": self.name,
            "kind": self.kind,
            "rules": [{"variable": v, side: value} for v, side, value in self.rules],
        }

    @classmethod
    def from_dict(cls, d, where):
        raw = d.get("rules")
        if not isinstance(raw, list) or not raw:
            raise SettingsError(
                f"{where}: key 'rules' must be a non-empty list of "
                f"{{variable = ..., above|below = ...}}; got {raw!r}"
            )
        rules = []
        for k, r in enumerate(raw):
            w = f"{where}: rules[{k}]"
            if not isinstance(r, Mapping) or not isinstance(r.get("variable"), str):
                raise SettingsError(f"{w} needs a key 'variable' (a string); got {r!r}")
            sides = [s for s in ("above", "below") if s in r]
            extra = set(r) - {"variable", "above", "below"}
            if len(sides) != 1 or extra:
                raise SettingsError(
                    f"{w} needs exactly one of 'above' or 'below' and no other key; "
                    f"got keys {sorted(r)}"
                )
            rules.append((r["variable"], sides[0], _number(r[sides[0]], f"{w}.{sides[0]}")))
        return cls(_name(d, where), tuple(rules))


@dataclass(frozen=True)
class Cluster(Regime):
    """The cell of a cluster centre: states nearer to it than to every other cluster of the set.

    Distances are Euclidean after dividing each variable by ``scale`` (the reference's standard
    deviation when fitted by k-means). ``radius`` (in scaled units), if given, also bounds the cell.
    Nearest-centre assignment needs all clusters at once, so :class:`RegimeSet` classifies them
    together; ``contains`` alone treats this cluster as the only one.

    References
    ----------
    .. [1] S. P. Lloyd, "Least squares quantization in PCM", IEEE Trans. Inf. Theory 28, 129–137
       (1982) (k-means).
    """

    name: str
    centre: dict[str, float]
    scale: dict[str, float] = field(default_factory=dict)
    radius: float | None = None
    kind = "cluster"

    def scaled_distance(self, states, variables) -> np.ndarray:
        idx = [_variable_index(variables, v, self.name) for v in self.centre]
        c = np.array(list(self.centre.values()))
        s = np.array([self.scale.get(v, 1.0) for v in self.centre])
        return np.sqrt(np.sum(((np.asarray(states, float)[:, idx] - c) / s) ** 2, axis=1))

    def contains(self, states, variables):
        return self.within_radius(self.scaled_distance(states, variables))

    def within_radius(self, d: np.ndarray) -> np.ndarray:
        """Which scaled distances ``d`` lie inside ``radius`` (all of them without a radius)."""
        return d <= self.radius if self.radius is not None else np.ones(d.shape, bool)

    def to_dict(self):
        out = {"name": self.name, "kind": self.kind, "centre": dict(self.centre)}
        if self.scale:
            out["scale"] = dict(self.scale)
        if self.radius is not None:
            out["radius"] = self.radius
        return out

    @classmethod
    def from_dict(cls, d, where):
        scale = d.get("scale", {})
        if not isinstance(scale, Mapping):
            raise SettingsError(f"{where}: key 'scale' must be a table; got {scale!r}")
        scale = {str(k): _number(v, f"{where}: scale.{k}") for k, v in scale.items()}
        if any(v <= 0 for v in scale.values()):
            raise SettingsError(f"{where}: every 'scale' value must be positive")
        radius = d.get("radius")
        radius = None if radius is None else _number(radius, f"{where}: key 'radius'")
        return cls(_name(d, where), _centre(d, where), scale, radius)


@dataclass(frozen=True)
class KMeansRule(Regime):
    """An unfitted request for ``clusters`` k-means regimes named ``name0, name1, …``.

    :meth:`RegimeSet.fit` replaces it by :class:`Cluster` regimes learned on reference states.
    """

    name: str
    clusters: int
    seed: int = 0
    variables: tuple[str, ...] | None = None
    kind = "kmeans"

    def contains(self, states, variables):
        raise SettingsError(
            f"regime {self.name!r} (kmeans) must be fitted on reference data first (RegimeSet.fit)"
        )

    def to_dict(self):
        out = {"name": self.name, "kind": self.kind, "clusters": self.clusters, "seed": self.seed}
        if self.variables is not None:
            out["variables"] = list(self.variables)
        return out

    @classmethod
    def from_dict(cls, d, where):
        k = d.get("clusters")
        if isinstance(k, bool) or not isinstance(k, int) or k < 2:
            raise SettingsError(f"{where}: key 'clusters' must be an integer ≥ 2; got {k!r}")
        seed = d.get("seed", 0)
        if isinstance(seed, bool) or not isinstance(seed, int) or not 0 <= seed < 2**32:
            # scikit-learn's KMeans takes seeds in 0 .. 2**32 - 1
            raise SettingsError(
                f"{where}: key 'seed' must be an integer from 0 to 2**32 - 1; got {seed!r}"
            )
        variables = d.get("variables")
        if variables is not None and (
            not isinstance(variables, list) or not all(isinstance(v, str) for v in variables)
        ):
            raise SettingsError(
                f"{where}: key 'variables' must be a list of names; got {variables!r}"
            )
        return cls(_name(d, where), k, seed, None if variables is None else tuple(variables))

    def fit(self, states, variables) -> list[Cluster]:
        from sklearn.cluster import KMeans

        use = list(self.variables) if self.variables is not None else list(variables)
        idx = [_variable_index(variables, v, self.name) for v in use]
        x = np.asarray(states, float)[:, idx]
        x = x[np.all(np.isfinite(x), axis=1)]
        if x.shape[0] < self.clusters:
            raise DataError(
                f"regime {self.name!r}: {x.shape[0]} states cannot make {self.clusters} clusters"
            )
        scale = x.std(axis=0)
        scale[scale == 0] = 1.0
        km = KMeans(n_clusters=self.clusters, n_init=10, random_state=self.seed).fit(x / scale)
        centres = km.cluster_centers_ * scale
        # order clusters by their first coordinate so names do not depend on k-means' internal order
        order = np.lexsort(centres.T[::-1])
        return [
            Cluster(
                f"{self.name}{i}",
                {v: float(centres[j, m]) for m, v in enumerate(use)},
                {v: float(scale[m]) for m, v in enumerate(use)},
            )
            for i, j in enumerate(order)
        ]


#: kind name → class; files and dictionaries name one of these.
REGIME_KINDS: dict[str, type[Regime]] = {c.kind: c for c in (Ball, Threshold, Cluster, KMeansRule)}


class RegimeSet:
    """An ordered collection of regimes that labels states.

    Parameters
    ----------
    regimes : sequence of Regime
        The first regime that contains a state gives its label (its position in the list).
    hold : bool, default False
        Core regimes: a state in no regime keeps the label of the regime last visited (within a
        run; ``"none"`` only before the first visit), so a visit lasts from entering one regime
        until entering another. For a one-dimensional diffusion with cores ``x ≤ −a`` and
        ``x ≥ a`` the mean residence time is then the mean first-passage time from ``−a`` to
        ``a`` (milestoning: C. Schütte, F. Noé, J. Lu, M. Sarich and E. Vanden-Eijnden, J. Chem.
        Phys. 134, 204105, 2011). Without ``hold`` every crossing of a regime's edge ends a
        visit, and residence times count the flicker at the edges.
    """

    FORMAT = "ergodex-regimes/1"

    def __init__(self, regimes: Sequence[Regime], *, hold: bool = False):
        self.regimes = tuple(regimes)
        if not isinstance(hold, (bool, np.bool_)):
            raise SettingsError(f"regimes: 'hold' must be true or false; got {hold!r}")
        self.hold = bool(hold)
        if not self.regimes:
            raise SettingsError("a regime set needs at least one regime")
        names = [r.name for r in self.regimes]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise SettingsError(f"regime names must be unique; repeated: {dup}")

    def __repr__(self):
        return f"RegimeSet({[r.name for r in self.regimes]})"

    def __eq__(self, other):
        return isinstance(other, RegimeSet) and self.to_dict() == other.to_dict()

    @property
    def names(self) -> tuple[str, ...]:
        """Regime names in label order (label ``k`` is ``names[k]``; ``-1`` is ``"none"``)."""
        return tuple(r.name for r in self.regimes)

    @property
    def n_regimes(self) -> int:
        return len(self.regimes)

    @property
    def needs_fit(self) -> bool:
        return any(isinstance(r, KMeansRule) for r in self.regimes)

    # -- construction ----------------------------------------------------------------------
    @classmethod
    def from_dict(cls, d: Mapping, *, source: str = "regimes") -> RegimeSet:
        """Read ``{"regime": [{"name": ..., "kind": ..., ...}, ...]}`` (the TOML layout)."""
        if not isinstance(d, Mapping):
            raise SettingsError(
                f"{source}: expected a table with key 'regime'; got {type(d).__name__}"
            )
        unknown = set(d) - {"regime", "format", "hold"}
        if unknown:
            raise SettingsError(
                f"{source}: unknown top-level key(s) {sorted(unknown)}; expected 'regime' "
                f"(and optionally 'hold')"
            )
        hold = d.get("hold", False)
        if not isinstance(hold, bool):
            raise SettingsError(f"{source}: key 'hold' must be true or false; got {hold!r}")
        entries = d.get("regime")
        if not isinstance(entries, list) or not entries:
            raise SettingsError(f"{source}: key 'regime' must be a non-empty list of regimes")
        out = []
        for i, e in enumerate(entries):
            where = f"{source}: regime[{i}]"
            if not isinstance(e, Mapping):
                raise SettingsError(f"{where} must be a table; got {e!r}")
            kind = e.get("kind")
            if kind not in REGIME_KINDS:
                raise SettingsError(
                    f"{where}: key 'kind' must be one of {sorted(REGIME_KINDS)}; got {kind!r}"
                )
            cls_ = REGIME_KINDS[kind]
            allowed = {"name", "kind"} | {
                "ball": {"centre", "radius"},
                "threshold": {"rules"},
                "cluster": {"centre", "scale", "radius"},
                "kmeans": {"clusters", "seed", "variables"},
            }[kind]
            extra = set(e) - allowed
            if extra:
                raise SettingsError(
                    f"{where}: unknown key(s) {sorted(extra)} for kind {kind!r}; "
                    f"allowed: {sorted(allowed)}"
                )
            out.append(cls_.from_dict(e, where))
        return cls(out, hold=hold)

    @classmethod
    def from_toml(cls, path) -> RegimeSet:
        """Read a regime file (see the module docstring for its layout)."""
        from ergodex.limits import load_toml_file

        path = Path(path)
        if not os.path.lexists(path):
            raise DataError(f"{path}: regime file not found")
        d = load_toml_file(path, "a regime file (TOML)")
        return cls.from_dict(d, source=str(path))

    def to_dict(self) -> dict:
        out: dict = {"format": self.FORMAT, "regime": [r.to_dict() for r in self.regimes]}
        if self.hold:  # only when set, so that sets without it keep their dictionaries
            out["hold"] = True
        return out

    def fit(self, states, variables: Sequence[str]) -> RegimeSet:
        """A new set with every ``kmeans`` request replaced by clusters learned from ``states``."""
        out: list[Regime] = []
        for r in self.regimes:
            out.extend(r.fit(states, variables) if isinstance(r, KMeansRule) else [r])
        return RegimeSet(out, hold=self.hold)

    # -- labelling -------------------------------------------------------------------------
    def classify(self, states, variables: Sequence[str]) -> np.ndarray:
        """Label each state: index of the first regime containing it, or ``-1`` (``"none"``).

        Parameters
        ----------
        states : array_like, shape (n_samples, n_variables)
            Non-finite rows get ``-1``.
        variables : sequence of str
            Names of the columns of ``states``.

        Returns
        -------
        labels : ndarray of int, shape (n_samples,)
        """
        states = np.asarray(states, float)
        if states.ndim != 2 or states.shape[1] != len(variables):
            raise DataError(f"states must be (n_samples, {len(variables)}); got {states.shape}")
        labels = np.full(states.shape[0], NONE_LABEL, dtype=np.int64)
        finite = np.all(np.isfinite(states), axis=1)
        clusters = [(i, r) for i, r in enumerate(self.regimes) if isinstance(r, Cluster)]
        nearest = None
        distance = {}  # regime index -> scaled distance, computed once per cluster
        if clusters:
            d = np.stack([r.scaled_distance(states, variables) for _, r in clusters], axis=1)
            nearest = np.array([i for i, _ in clusters])[
                np.argmin(np.where(np.isfinite(d), d, np.inf), axis=1)
            ]
            distance = {i: d[:, k] for k, (i, _) in enumerate(clusters)}
        unset = finite.copy()
        for i, r in enumerate(self.regimes):
            if isinstance(r, Cluster):
                hit = r.within_radius(distance[i]) & (nearest == i)
            else:
                hit = r.contains(states, variables)
            hit &= unset
            labels[hit] = i
            unset &= ~hit
        if self.hold:
            # carry the last regime forward over finite states in none; a non-finite row
            # (and the start of the run) resets to none
            marks = np.where((labels >= 0) | ~finite, np.arange(labels.size), -1)
            last = np.maximum.accumulate(marks)
            labels = np.where(last >= 0, labels[np.maximum(last, 0)], NONE_LABEL)
        return labels


# ---------------------------------------------------------------------------------------------
# Statistics of labels
# ---------------------------------------------------------------------------------------------


def _label_runs(labels) -> list[np.ndarray]:
    if isinstance(labels, (list, tuple)):
        return [np.asarray(run, dtype=np.int64).ravel() for run in labels]
    return [np.asarray(labels, dtype=np.int64).ravel()]


def occupancy(labels, n_regimes: int) -> np.ndarray:
    """Fraction of samples in each regime, ``"none"`` last.

    Parameters
    ----------
    labels : array_like of int, or list of such (runs)
    n_regimes : int

    Returns
    -------
    fractions : ndarray, shape (n_regimes + 1,)
        Entry ``k`` for regime ``k``; the last entry for ``-1`` (none). Sums to 1.
    """
    flat = np.concatenate(_label_runs(labels))
    if flat.size == 0:
        raise DataError("no labels to count")
    idx = np.where(flat < 0, n_regimes, flat)
    return np.bincount(idx, minlength=n_regimes + 1)[: n_regimes + 1] / flat.size


def _episodes(run: np.ndarray):
    """(label, start, length) of each maximal block of equal labels."""
    if run.size == 0:
        return np.array([], int), np.array([], int), np.array([], int)
    change = np.flatnonzero(np.diff(run)) + 1
    starts = np.concatenate([[0], change])
    lengths = np.diff(np.concatenate([starts, [run.size]]))
    return run[starts], starts, lengths


def residence_times(
    labels, dt: float, n_regimes: int, *, include_censored: bool = False
) -> list[np.ndarray]:
    """Durations of the visits to each regime (``"none"`` last).

    A visit that touches the start or end of a run is censored (its true length is unknown) and
    left out unless ``include_censored``.

    Returns
    -------
    list of ndarray
        ``n_regimes + 1`` arrays of durations in time units (``samples × dt``).
    """
    labs, durs = [], []
    for run in _label_runs(labels):
        lab, starts, lengths = _episodes(run)
        keep = np.ones(lab.size, bool)
        if not include_censored and lab.size:
            keep &= (starts > 0) & (starts + lengths < run.size)
        labs.append(np.where(lab[keep] < 0, n_regimes, lab[keep]))
        durs.append(lengths[keep] * dt)
    lab_all = np.concatenate(labs) if labs else np.zeros(0, int)
    dur_all = np.concatenate(durs) if durs else np.zeros(0)
    return [dur_all[lab_all == k].astype(float) for k in range(n_regimes + 1)]


def mean_residence_times(labels, dt: float, n_regimes: int) -> np.ndarray:
    """Mean visit duration per regime (``"none"`` last); NaN where no complete visit was seen."""
    res = residence_times(labels, dt, n_regimes)
    return np.array([v.mean() if v.size else np.nan for v in res])


def transition_matrix(labels, n_regimes: int) -> np.ndarray:
    """Probabilities of the next regime visited, given the current one (``"none"`` last).

    Counts changes of label only (the jump chain), so the matrix does not depend on the sampling
    interval; the diagonal is zero. Rows of regimes never left are all zero.

    Returns
    -------
    P : ndarray, shape (n_regimes + 1, n_regimes + 1)
        ``P[i, j]`` = fraction of departures from ``i`` that go to ``j``.
    """
    counts = np.zeros((n_regimes + 1, n_regimes + 1))
    for run in _label_runs(labels):
        lab = _episodes(run)[0]
        lab = np.where(lab < 0, n_regimes, lab)
        if lab.size > 1:
            np.add.at(counts, (lab[:-1], lab[1:]), 1.0)
    rows = counts.sum(axis=1, keepdims=True)
    return np.divide(counts, rows, out=np.zeros_like(counts), where=rows > 0)
