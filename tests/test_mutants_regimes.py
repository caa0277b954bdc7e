"""Regimes: boundaries, file layout, k-means fitting and the regime-file checks, one behaviour at
a time (each found missing by a mutation run, ``benchmarks/mutation.py regimes``)."""

from __future__ import annotations

import re
import warnings

import numpy as np
import pytest

from ergodex.exceptions import DataError, SettingsError
from ergodex.regimes import (
    Ball,
    Cluster,
    KMeansRule,
    RegimeSet,
    Threshold,
    mean_residence_times,
    residence_times,
)

XY = ("x", "y")


def _one(entry: dict) -> RegimeSet:
    return RegimeSet.from_dict({"regime": [entry]})


# -- membership ---------------------------------------------------------------------------------


def test_ball_is_closed_and_uses_the_euclidean_distance():
    ball = Ball("b", {"x": 0.0, "y": 0.0}, 5.0)
    # (3, 4) lies at distance exactly 5 (Pythagorean triple, exact in binary floating point):
    # "within radius" includes the sphere; (3, 4.01) is outside, (0, 4.9) inside
    states = np.array([[3.0, 4.0], [3.0, 4.01], [0.0, 4.9], [-5.0, 0.0], [5.1, 0.0]])
    np.testing.assert_array_equal(ball.contains(states, XY), [True, False, True, True, False])


def test_threshold_above_and_below_are_strict():
    # "above" / "below" in the everyday sense: a value equal to the bound is neither
    # (common practice, no source)
    up = Threshold("up", (("x", "above", 1.0),))
    down = Threshold("down", (("x", "below", 1.0),))
    states = np.array([[0.5, 0.0], [1.0, 0.0], [1.5, 0.0]])
    np.testing.assert_array_equal(up.contains(states, XY), [False, False, True])
    np.testing.assert_array_equal(down.contains(states, XY), [True, False, False])


def test_a_missing_variable_names_the_regime_and_the_variable():
    states = np.zeros((2, 2))
    expected = (
        r"^regime 'r' uses variable 'z', which is not among the data's variables \['x', 'y'\]$"
    )
    for regime in (
        Ball("r", {"z": 0.0}, 1.0),
        Threshold("r", (("z", "above", 0.0),)),
        Cluster("r", {"z": 0.0}),
        KMeansRule("r", 2, variables=("z",)),
    ):
        with pytest.raises(DataError, match=expected):
            if isinstance(regime, KMeansRule):
                regime.fit(states, XY)
            else:
                regime.contains(states, XY)


def test_cluster_distance_is_divided_by_the_scale_and_unscaled_without_one():
    # hand-computed: (x - 1) / 2 = 1.5 and (y - 0) / 1 = 2 → distance 2.5; unscaled 3, 4 → 5
    scaled = Cluster("c", {"x": 1.0, "y": 0.0}, {"x": 2.0})
    np.testing.assert_allclose(scaled.scaled_distance(np.array([[4.0, 2.0]]), XY), [2.5])
    plain = Cluster("c", {"x": 0.0, "y": 0.0})
    np.testing.assert_allclose(plain.scaled_distance(np.array([[3.0, 4.0]]), XY), [5.0])


def test_cluster_alone_is_bounded_by_its_radius_inclusive():
    # "contains alone treats this cluster as the only one": everything without a radius, the
    # closed ball of scaled radius with one (same convention as Ball)
    states = np.array([[3.0, 4.0], [3.0, 4.01], [30.0, 40.0]])
    np.testing.assert_array_equal(
        Cluster("c", {"x": 0.0, "y": 0.0}, radius=5.0).contains(states, XY), [True, False, False]
    )
    np.testing.assert_array_equal(
        Cluster("c", {"x": 0.0, "y": 0.0}).contains(states, XY), [True, True, True]
    )


def test_cluster_set_labels_the_nearest_centre_within_its_radius():
    rs = RegimeSet(
        [Cluster("a", {"x": 0.0, "y": 0.0}, radius=1.0), Cluster("b", {"x": 4.0, "y": 0.0})]
    )
    states = np.array([[0.5, 0.0], [1.5, 0.0], [3.0, 0.0], [2.0 - 1e-9, 0.0]])
    # [1.5, 0] is nearer to a but outside a's radius, and not in b's cell → none (−1)
    np.testing.assert_array_equal(rs.classify(states, XY), [0, -1, 1, -1])


def test_an_unfitted_kmeans_request_says_to_fit_first():
    with pytest.raises(SettingsError, match=r"^regime 'k' \(kmeans\) must be fitted .*RegimeSet"):
        KMeansRule("k", 2).contains(np.zeros((1, 2)), XY)
    with pytest.raises(SettingsError, match=r"^regime 'k' \(kmeans\) must be fitted"):
        _one({"name": "k", "kind": "kmeans", "clusters": 2}).classify(np.zeros((1, 2)), XY)


# -- k-means fitting ------------------------------------------------------------------------------


def _ring(seed: int, n: int = 400) -> np.ndarray:
    """Points near a circle, y stretched ×3: k-means has many near-equal optima here, so the
    answer depends on the seed and on the number of restarts."""
    rng = np.random.default_rng(seed)
    phi = rng.uniform(0, 2 * np.pi, n)
    return np.column_stack([np.cos(phi), 3.0 * np.sin(phi)]) + rng.normal(0, 0.05, (n, 2))


def test_kmeans_centres_equal_scikit_learns_on_standardised_data():
    from sklearn.cluster import KMeans

    x = _ring(41)
    fitted = KMeansRule("g", 4, seed=7).fit(x, XY)
    # reference: scikit-learn's KMeans (10 restarts, the given seed) on x / std (population std,
    # numpy's default ddof 0), centres scaled back, ordered by their first coordinate
    scale = x.std(axis=0)
    km = KMeans(n_clusters=4, n_init=10, random_state=7).fit(x / scale)
    centres = km.cluster_centers_ * scale
    centres = centres[np.argsort(centres[:, 0])]
    assert [c.name for c in fitted] == ["g0", "g1", "g2", "g3"]
    got = np.array([[c.centre["x"], c.centre["y"]] for c in fitted])
    np.testing.assert_allclose(got, centres, rtol=1e-12)
    for c in fitted:
        assert c.scale == pytest.approx({"x": scale[0], "y": scale[1]}, rel=1e-12)
    # the data is seed-sensitive, so the comparison above does pin the seed
    other = KMeansRule("g", 4, seed=8).fit(x, XY)
    assert not np.allclose(got, [[c.centre["x"], c.centre["y"]] for c in other])


def test_kmeans_names_follow_the_first_coordinate():
    # three groups whose order by x (left to right) is the reverse of their order by y
    rng = np.random.default_rng(3)
    groups = np.array([[0.0, 20.0], [10.0, 10.0], [20.0, 0.0]])
    x = np.repeat(groups, 50, axis=0) + rng.normal(0, 0.1, (150, 2))
    fitted = KMeansRule("g", 3, seed=0).fit(x, XY)
    xs = [c.centre["x"] for c in fitted]
    assert xs == sorted(xs) and xs[0] < 1 and xs[2] > 19


def test_kmeans_on_chosen_variables_and_a_constant_one():
    rng = np.random.default_rng(5)
    a = np.concatenate([rng.normal(-3, 0.2, 60), rng.normal(3, 0.2, 60)])
    states = np.column_stack([a, np.full(120, 7.0)])
    only_x = KMeansRule("g", 2, variables=("x",)).fit(states, XY)
    assert [set(c.centre) for c in only_x] == [{"x"}, {"x"}]
    both = KMeansRule("g", 2).fit(states, XY)
    for c in both:
        # a variable with no spread is left unscaled (scale 1) rather than divided by zero
        # (common practice, no source); its centre is the constant
        assert c.scale["y"] == 1.0 and c.centre["y"] == pytest.approx(7.0)
        assert np.isfinite(list(c.centre.values())).all()
    assert sorted(round(c.centre["x"]) for c in both) == [-3, 3]


def test_kmeans_needs_as_many_finite_states_as_clusters():
    three = np.array([[0.0, 0.0], [1.0, 5.0], [2.0, 9.0], [np.nan, 1.0]])
    fitted = KMeansRule("g", 3).fit(three, XY)  # exactly three finite states: one per cluster
    assert sorted(c.centre["x"] for c in fitted) == pytest.approx([0.0, 1.0, 2.0])
    with pytest.raises(DataError, match=r"^regime 'g': 3 states cannot make 4 clusters$"):
        KMeansRule("g", 4).fit(three, XY)


# -- the file layout ------------------------------------------------------------------------------


def test_to_dict_is_the_documented_file_layout():
    rs = RegimeSet(
        [
            Ball("b", {"x": 1.0}, 2.0),
            Threshold("t", (("x", "above", 1.0), ("y", "below", 2.0))),
            Cluster("c", {"x": 0.0}, {"x": 2.0}, 1.5),
            Cluster("d", {"y": 0.0}),
            KMeansRule("k", 3, 4, ("x",)),
            KMeansRule("m", 2),
        ]
    )
    # the layout of the module docstring: [[regime]] tables with name, kind and their keys
    assert rs.to_dict() == {
        "format": "ergodex-regimes/1",
        "regime": [
            {"name": "b", "kind": "ball", "centre": {"x": 1.0}, "radius": 2.0},
            {
                "name": "t",
                "kind": "threshold",
                "rules": [{"variable": "x", "above": 1.0}, {"variable": "y", "below": 2.0}],
            },
            {
                "name": "c",
                "kind": "cluster",
                "centre": {"x": 0.0},
                "scale": {"x": 2.0},
                "radius": 1.5,
            },
            {"name": "d", "kind": "cluster", "centre": {"y": 0.0}},
            {"name": "k", "kind": "kmeans", "clusters": 3, "seed": 4, "variables": ["x"]},
            {"name": "m", "kind": "kmeans", "clusters": 2, "seed": 0},
        ],
    }
    assert RegimeSet.from_dict(rs.to_dict()) == rs
    assert RegimeSet.from_dict(rs.to_dict()).regimes == rs.regimes


def test_kmeans_entry_defaults_and_accepted_values():
    # seed 0 when not given (module docstring example and KMeansRule's signature)
    assert _one({"name": "k", "kind": "kmeans", "clusters": 2}).regimes == (KMeansRule("k", 2, 0),)
    for seed in (0, 5, 2**32 - 1):  # scikit-learn's KMeans takes 0 .. 2**32 - 1 (its docs)
        entry = {"name": "k", "kind": "kmeans", "clusters": 2, "seed": seed, "variables": ["y"]}
        assert _one(entry).regimes == (KMeansRule("k", 2, seed, ("y",)),)
    assert _one({"name": "k", "kind": "kmeans", "clusters": 7}).regimes[0].clusters == 7


def test_cluster_entry_keeps_scale_and_radius():
    entry = {"name": "c", "kind": "cluster", "centre": {"x": 0.0}, "scale": {"x": 0.5}, "radius": 2}
    assert _one(entry).regimes == (Cluster("c", {"x": 0.0}, {"x": 0.5}, 2.0),)
    bare = {"name": "c", "kind": "cluster", "centre": {"x": 0.0}}
    assert _one(bare).regimes == (Cluster("c", {"x": 0.0}, {}, None),)


def test_regime_sets_equal_only_regime_sets():
    rs = _one({"name": "b", "kind": "ball", "centre": {"x": 0.0}, "radius": 1.0})
    assert rs != "b" and rs != None and rs != rs.to_dict()  # noqa: E711


S = "regimes: regime[0]"
BALL = {"name": "b", "kind": "ball", "centre": {"x": 0}, "radius": 1}
RULES = {"name": "t", "kind": "threshold"}
CLUSTER = {"name": "c", "kind": "cluster", "centre": {"x": 0}}
KMEANS = {"name": "k", "kind": "kmeans", "clusters": 2}
NUMBER = "must be a finite number; got"
NAME = "key 'name' must be a non-empty string; got"
CENTRE = "key 'centre' must be a table {variable = value, ...}; got"
ONE_SIDE = "needs exactly one of 'above' or 'below' and no other key; got keys"
CLUSTERS = "key 'clusters' must be an integer ≥ 2; got"
SEED = "key 'seed' must be an integer from 0 to 2**32 - 1; got"
VARIABLES = "key 'variables' must be a list of names; got"
BAD = [
    # (entry, anchored message); every message names where in the file the problem is
    (BALL | {"radius": 0}, f"{S}: key 'radius' must be positive; got 0.0"),
    (BALL | {"radius": "1"}, f"{S}: key 'radius' {NUMBER} '1'"),
    ({k: v for k, v in BALL.items() if k != "name"}, f"{S}: {NAME} None"),
    (BALL | {"name": "none"}, f"{S}: the name 'none' is reserved for states in no regime"),
    (BALL | {"centre": {}}, f"{S}: {CENTRE} {{}}"),
    (BALL | {"centre": {"x": "a"}}, f"{S}: centre.x {NUMBER} 'a'"),
    (
        RULES | {"rules": []},
        f"{S}: key 'rules' must be a non-empty list of {{variable = ..., above|below = ...}}; "
        "got []",
    ),
    (RULES | {"rules": ["x"]}, f"{S}: rules[0] needs a key 'variable' (a string); got 'x'"),
    (
        RULES | {"rules": [{"above": 1}]},
        f"{S}: rules[0] needs a key 'variable' (a string); got {{'above': 1}}",
    ),
    (
        RULES | {"rules": [{"variable": "x", "above": 1, "below": 2}]},
        f"{S}: rules[0] {ONE_SIDE} ['above', 'below', 'variable']",
    ),
    (
        RULES | {"rules": [{"variable": "x", "above": 1, "c": 2}]},
        f"{S}: rules[0] {ONE_SIDE} ['above', 'c', 'variable']",
    ),
    (RULES | {"rules": [{"variable": "x", "below": "2"}]}, f"{S}: rules[0].below {NUMBER} '2'"),
    (RULES | {"name": "", "rules": [{"variable": "x", "below": 2}]}, f"{S}: {NAME} ''"),
    (CLUSTER | {"scale": [1]}, f"{S}: key 'scale' must be a table; got [1]"),
    (CLUSTER | {"scale": {"x": "s"}}, f"{S}: scale.x {NUMBER} 's'"),
    (CLUSTER | {"scale": {"x": 0}}, f"{S}: every 'scale' value must be positive"),
    (CLUSTER | {"radius": "r"}, f"{S}: key 'radius' {NUMBER} 'r'"),
    (CLUSTER | {"name": 3}, f"{S}: {NAME} 3"),
    (CLUSTER | {"centre": None}, f"{S}: {CENTRE} None"),
    (KMEANS | {"clusters": 1}, f"{S}: {CLUSTERS} 1"),
    (KMEANS | {"clusters": 2.5}, f"{S}: {CLUSTERS} 2.5"),
    (KMEANS | {"clusters": True}, f"{S}: {CLUSTERS} True"),
    (KMEANS | {"clusters": "3"}, f"{S}: {CLUSTERS} '3'"),
    (KMEANS | {"seed": -1}, f"{S}: {SEED} -1"),
    (KMEANS | {"seed": 2**32}, f"{S}: {SEED} 4294967296"),
    (KMEANS | {"seed": True}, f"{S}: {SEED} True"),
    (KMEANS | {"seed": "1"}, f"{S}: {SEED} '1'"),
    (KMEANS | {"variables": "xy"}, f"{S}: {VARIABLES} 'xy'"),
    (KMEANS | {"variables": [1]}, f"{S}: {VARIABLES} [1]"),
    ({"kind": "kmeans", "clusters": 2}, f"{S}: {NAME} None"),
    ("ball", f"{S} must be a table; got 'ball'"),
]


@pytest.mark.parametrize("entry, message", BAD)
def test_bad_regime_entries_name_the_key(entry, message):
    with pytest.raises(SettingsError, match="^" + re.escape(message) + "$"):
        RegimeSet.from_dict({"regime": [entry]})


def test_bad_regime_tables_name_the_problem():
    cases = [
        (["a"], "regimes: expected a table with key 'regime'; got list"),
        (
            {"regime": [], "x": 1},
            "regimes: unknown top-level key(s) ['x']; expected 'regime' (and optionally 'hold')",
        ),
        ({"regime": []}, "regimes: key 'regime' must be a non-empty list of regimes"),
        ({"regime": {"name": "a"}}, "regimes: key 'regime' must be a non-empty list of regimes"),
    ]
    for table, message in cases:
        with pytest.raises(SettingsError, match="^" + re.escape(message) + "$"):
            RegimeSet.from_dict(table)


def test_a_folder_given_as_regime_file_says_what_was_expected(tmp_path):
    folder = tmp_path / "r.toml"
    folder.mkdir()
    with pytest.raises(DataError, match=r"r\.toml: is a folder, expected a regime file \(TOML\)$"):
        RegimeSet.from_toml(folder)


# -- statistics of labels --------------------------------------------------------------------------


def test_no_runs_give_empty_residence_times_quietly():
    # an empty list of runs: n_regimes + 1 empty arrays of durations; the mean is NaN without
    # a warning ("NaN where no complete visit was seen")
    res = residence_times([], 0.5, 2)
    assert len(res) == 3 and all(r.size == 0 and r.dtype == float for r in res)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        means = mean_residence_times([np.array([0, 0, 1])], 1.0, 1)
    assert np.isnan(means).all()


# -- the set -------------------------------------------------------------------------------------


def test_first_listed_regime_wins_over_every_later_one():
    # module docstring: "When regions overlap, the first regime listed wins"
    rs = RegimeSet(
        [
            Threshold("a", (("x", "above", 0.0),)),
            Threshold("b", (("y", "above", 0.0),)),
            Threshold("c", (("x", "above", -1.0),)),
        ]
    )
    states = np.array([[1.0, -1.0], [1.0, 1.0], [-0.5, 1.0], [-0.5, -1.0], [-2.0, -1.0]])
    np.testing.assert_array_equal(rs.classify(states, XY), [0, 0, 1, 2, -1])


def test_clusters_label_non_finite_states_none_and_the_rest_by_nearest_centre():
    rs = RegimeSet([Cluster("a", {"x": 0.0, "y": 0.0}), Cluster("b", {"x": 4.0, "y": 0.0})])
    states = np.array([[np.nan, 0.0], [3.0, 0.0], [1.0, np.inf], [1.0, 0.0]])
    np.testing.assert_array_equal(rs.classify(states, XY), [-1, 1, -1, 0])


def test_classify_checks_the_shape_of_the_states():
    rs = RegimeSet([Ball("b", {"x": 0.0}, 1.0)])
    with pytest.raises(DataError, match=r"^states must be \(n_samples, 2\); got \(4, 3\)$"):
        rs.classify(np.zeros((4, 3)), XY)
    with pytest.raises(DataError, match=r"^states must be \(n_samples, 2\); got \(4,\)$"):
        rs.classify(np.zeros(4), XY)


def test_a_regime_set_needs_regimes_with_distinct_names():
    with pytest.raises(SettingsError, match="^a regime set needs at least one regime$"):
        RegimeSet([])
    with pytest.raises(SettingsError, match=r"^regime names must be unique; repeated: \['a'\]$"):
        RegimeSet([Ball("a", {"x": 0.0}, 1.0), Ball("a", {"y": 0.0}, 1.0)])
    with pytest.raises(SettingsError, match=re.escape(f"{S}: {NAME} '  '")):
        _one(BALL | {"name": "  "})


def test_fit_keeps_the_regimes_that_need_no_fitting_in_place():
    rng = np.random.default_rng(8)
    x = np.concatenate([rng.normal(-4, 0.3, (40, 2)), rng.normal(4, 0.3, (40, 2))])
    rs = RegimeSet([Ball("b", {"x": 0.0}, 0.5), KMeansRule("k", 2), Ball("e", {"y": 9.0}, 1.0)])
    fitted = rs.fit(x, XY)
    assert fitted.names == ("b", "k0", "k1", "e")
    assert fitted.regimes[0] == rs.regimes[0] and fitted.regimes[3] == rs.regimes[2]
    assert not fitted.needs_fit and rs.needs_fit


def test_regime_defaults_as_documented():
    # residence_times docstring: censored visits are "left out unless include_censored";
    # Cluster: no scale (unscaled) and no radius unless given; KMeansRule: seed 0, all variables
    import inspect

    def defaults(fn):
        return {
            k: p.default
            for k, p in inspect.signature(fn).parameters.items()
            if p.default is not inspect.Parameter.empty
        }

    assert defaults(residence_times) == {"include_censored": False}
    c = Cluster("c", {"x": 0.0})
    assert c.scale == {} and c.radius is None
    k = KMeansRule("k", 2)
    assert k.seed == 0 and k.variables is None
    assert defaults(RegimeSet.from_dict) == {"source": "regimes"}
