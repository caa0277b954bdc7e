"""Statistics of regime labels on hand-labelled runs: what the occupancy, residence and
transition rows of the verdict compare."""

from __future__ import annotations

import numpy as np
import pytest

from ergodex.exceptions import DataError
from ergodex.regimes import mean_residence_times, occupancy, residence_times, transition_matrix

# two regimes (0, 1) and none (−1); every count below is by hand
A = [0, 0, 1, 1, 1, -1, 0]
B = [1, 1]
C = [0, 1, 1, 0]


def test_occupancy_counts_every_sample_none_last():
    np.testing.assert_allclose(occupancy([A, B], 2), np.array([3, 5, 1]) / 9)
    np.testing.assert_allclose(occupancy(np.array(B), 2), [0.0, 1.0, 0.0])
    np.testing.assert_allclose(occupancy([[-1, -1]], 3), [0.0, 0.0, 0.0, 1.0])
    with pytest.raises(DataError, match="^no labels to count$"):
        occupancy([[]], 2)


def test_residence_times_leave_out_visits_cut_by_a_run_edge():
    res = residence_times([A, B, C], 0.5, 2)
    # complete visits: A: regime 1 for 3 samples, none for 1; C: regime 1 for 2 samples from
    # index 1; the rest touch a run's start or end (censored)
    assert [r.tolist() for r in res] == [[], [1.5, 1.0], [0.5]]
    everything = residence_times([A, B, C], 0.5, 2, include_censored=True)
    assert [r.tolist() for r in everything] == [[1.0, 0.5, 0.5, 0.5], [1.5, 1.0, 1.0], [0.5]]
    means = mean_residence_times([A, B, C], 0.5, 2)
    assert np.isnan(means[0]) and means[1] == 1.25 and means[2] == 0.5
    assert [r.tolist() for r in residence_times([[]], 1.0, 1)] == [[], []]


def test_transition_matrix_is_the_jump_chain():
    # departures: 0→1 (A), 1→none (A), none→0 (A), 0→1 ([0, 1]), 0→none ([0, −1]);
    # B and [1, 1, 1] stay put
    P = transition_matrix([A, B, [0, 1], [0, -1], [1, 1, 1]], 2)
    np.testing.assert_allclose(P, [[0, 2 / 3, 1 / 3], [0, 0, 1], [1, 0, 0]])
    np.testing.assert_array_equal(transition_matrix([B], 2), np.zeros((3, 3)))
