"""Selection by long-run statistics: the sparsest passing candidate, the front, local vs Dask."""

from __future__ import annotations

import json

import numpy as np
import pytest

from ergodex.exceptions import SettingsError
from ergodex.fitting.selection import parse_selection, prune_sweep, select
from ergodex.validation import CheckSpec

CANDIDATES = [
    ("sparse", {"prune_below": 0.1}),
    ("sparse", {"prune_below": 5.0}),
    (
        "linear-inverse",
        {"tau0": 1000.0},
    ),  # longer than the data allow: a fit error, kept in the front
]


@pytest.fixture(scope="module")
def loop_data():
    from ergodex.scenarios import convection_loop

    fit_data = convection_loop(seed=60, n_runs=2, duration=60.0)
    held_out = convection_loop(seed=61, n_runs=4, duration=40.0)
    return fit_data, held_out


@pytest.fixture(scope="module")
def local_result(loop_data):
    fit_data, held_out = loop_data
    return select(
        fit_data,
        CANDIDATES,
        CheckSpec(members=8, seed=3),
        reference=held_out,
        n_jobs=1,
        progress=False,
    )


@pytest.mark.slow
def test_sparsest_passing_candidate_is_chosen(local_result):
    # The true convection-loop dynamics (Lorenz 1963) have 7 terms; the sweep's sparse fit at
    # threshold 0.1 finds them and passes, the threshold-5 fit drops terms and fails its
    # statistics, and the impossible LIM is kept as an error instead of stopping the sweep.
    result = local_result
    assert result.chosen == 0
    assert result.passed
    chosen = result.candidates[0]
    assert chosen.n_terms == 7 and chosen.verdict == "pass"
    assert result.surrogate.n_terms == 5
    sparse_fail = result.candidates[1]
    assert sparse_fail.verdict == "fail" and sparse_fail.n_terms < 7
    assert sparse_fail.statistical_score > chosen.statistical_score
    assert sparse_fail.reasons
    error = result.candidates[2]
    assert error.verdict == "error" and "longer than the data allow" in error.reasons[0]
    # the front: ordered by number of terms, failed fits last; the record is plain JSON
    assert [c.index for c in result.front] == [1, 0, 2]
    record = json.loads(json.dumps(result.to_dict()))
    assert record["chosen"] == 0 and len(record["candidates"]) == 3
    assert record["spec"]["seed"] == 3
    assert "* " in result.table()


@pytest.mark.slow
def test_dask_cluster_selects_the_same_model(loop_data, local_result):
    # joblib's Dask backend on a LocalCluster with 2 workers (threads, so no process start-up):
    # every candidate uses the same CheckSpec seed, so the statistics must agree to round-off.
    distributed = pytest.importorskip("distributed")
    fit_data, held_out = loop_data
    with (
        distributed.LocalCluster(
            n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None
        ) as cluster,
        distributed.Client(cluster) as client,
    ):
        remote = select(
            fit_data,
            CANDIDATES,
            CheckSpec(members=8, seed=3),
            reference=held_out,
            scheduler=client,
            progress=False,
        )
    assert remote.backend == "dask"
    assert remote.chosen == local_result.chosen
    for a, b in zip(remote.candidates, local_result.candidates):
        assert a.verdict == b.verdict and a.n_terms == b.n_terms
        if a.statistical_score is not None:
            assert a.statistical_score == pytest.approx(b.statistical_score, rel=1e-9)
    np.testing.assert_array_equal(
        remote.surrogate.coefficients, local_result.surrogate.coefficients
    )


def test_bad_candidate_settings_are_refused_before_any_work(loop_data):
    fit_data, _ = loop_data
    with pytest.raises(SettingsError, match="candidate 1: sparse has no setting 'treshold'"):
        select(fit_data, [("sparse", {}), ("sparse", {"treshold": 1.0})])
    with pytest.raises(SettingsError, match="either candidates or prune_below"):
        select(fit_data, [("sparse", {})], prune_below=[0.1])


def test_prune_sweep_keeps_the_base_settings():
    assert prune_sweep([0.1, 1.0], settings={"degree": 3}) == [
        ("sparse", {"degree": 3, "prune_below": 0.1}),
        ("sparse", {"degree": 3, "prune_below": 1.0}),
    ]


def test_parse_selection_table():
    document = {
        "method": "sparse",
        "select": {
            "prune_below": [0.05, 0.5],
            "candidates": [
                {"method": "linear-inverse", "tau0": 0.1},
                {"method": "quadratic-noise", "degree": 3},
            ],
        },
    }
    parsed = parse_selection(document, method="sparse", settings={"degree": 2})
    assert parsed == [
        ("sparse", {"degree": 2, "prune_below": 0.05}),
        ("sparse", {"degree": 2, "prune_below": 0.5}),
        ("linear-inverse", {"tau0": 0.1}),
        ("quadratic-noise", {"degree": 3}),
    ]
    with pytest.raises(SettingsError, match=r"\[select\] has no key 'prune'"):
        parse_selection({"select": {"prune": [1.0]}}, method="sparse", settings={})
    with pytest.raises(SettingsError, match=r"entry 1: linear-inverse has no setting 'degree'"):
        parse_selection(
            {"select": {"candidates": [{"method": "linear-inverse", "degree": 2}]}},
            method="sparse",
            settings={},
        )
    with pytest.raises(SettingsError, match="'prune_below' needs method 'sparse'"):
        parse_selection({"select": {"prune_below": [1.0]}}, method="linear-inverse", settings={})
