"""Tests of ``ergodex simulate`` run through the real command-line entry point."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from ergodex.cli import main
from ergodex.model_space import Standardise
from ergodex.readers import read_series
from ergodex.scenarios import CONVECTION_LOOP_VARIABLES, lorenz63_rhs, lorenz63_surrogate
from ergodex.series import Series
from ergodex.surrogate import Surrogate, Term, polynomial_terms
from ergodex.writers import write_csv

NAMES = CONVECTION_LOOP_VARIABLES


def lorenz63(extra_z2: float = 0.0, provenance=None) -> Surrogate:
    """The project's Lorenz-63 surrogate plus a ``extra_z2 dT_up^2`` term (zero by default)."""
    truth = lorenz63_surrogate()
    terms = truth.terms + (Term("monomial", (0, 0, 2)),)
    coef = np.hstack([truth.coefficients, [[0.0], [0.0], [extra_z2]]])
    return Surrogate(truth.variables, terms, coef, provenance=provenance)


def lorenz63_ode(_t, y):
    return lorenz63_rhs(np.asarray(y))


def test_simulate_writes_the_models_dynamics_reproducibly(tmp_path, capsys):
    model = tmp_path / "model.json"
    lorenz63(provenance={"dt": 0.01}).to_json(model)
    out = tmp_path / "sim.npz"
    code = main(
        [
            "simulate",
            str(model),
            "--members",
            "4",
            "--steps",
            "120",
            "--seed",
            "3",
            "--out",
            str(out),
        ]
    )
    assert code == 0
    assert "4 members integrated" in capsys.readouterr().err
    series = read_series(out)
    assert series.n_runs == 4 and series.lengths == (120,) * 4
    assert series.names == NAMES and series.dt == pytest.approx(0.01)
    # Each written run follows the Lorenz equations: scipy's DOP853 from the run's first row
    # agrees over 1.19 time units within RK4's error at h = 0.01 (~1e-4 absolute, amplified by
    # e^(0.906 * 1.19) ~ 3 by chaos; Lyapunov exponent from Sprott 2003).
    for run in series.runs:
        t = np.arange(120) * 0.01
        ref = solve_ivp(
            lorenz63_ode, (0, t[-1]), run[0], t_eval=t, method="DOP853", rtol=1e-10, atol=1e-10
        )
        np.testing.assert_allclose(run, ref.y.T, atol=2e-3)
    # After the 1000-step spin-up from tiny perturbations of the origin, the members are on the
    # attractor and far apart from each other (|z| well away from the origin's 0).
    starts = np.array([run[0] for run in series.runs])
    assert np.all(starts[:, 2] > 1.0) and np.min(np.ptp(starts, axis=0)) > 1.0
    # Same seed, same numbers.
    again = tmp_path / "again.npz"
    assert (
        main(
            [
                "simulate",
                str(model),
                "--members",
                "4",
                "--steps",
                "120",
                "--seed",
                "3",
                "--out",
                str(again),
            ]
        )
        == 0
    )
    for a, b in zip(series.runs, read_series(again).runs):
        np.testing.assert_array_equal(a, b)


def test_simulate_in_data_space_through_the_transform(tmp_path):
    rng = np.random.default_rng(21)
    data = rng.normal(loc=[5.0, -3.0], scale=[2.0, 0.5], size=(200, 2))
    transform = Standardise().fit(data, names=["a", "b"])
    # dz/dt = -z in model space: z(t) = z0 exp(-t), so x(t) = mean + scale * z0 * exp(-t).
    decay = Surrogate(
        ("za", "zb"), polynomial_terms(2, 1, include_bias=False), -np.eye(2), transform=transform
    )
    model = tmp_path / "decay.json"
    decay.to_json(model)
    start = tmp_path / "start.csv"
    write_csv(start, Series.from_arrays([data[:10]], ["a", "b"], 0.1))
    out = tmp_path / "sim.csv"
    code = main(
        [
            "simulate",
            str(model),
            "--members",
            "2",
            "--steps",
            "11",
            "--dt",
            "0.1",
            "--substep",
            "0.001",
            "--initial",
            str(start),
            "--out",
            str(out),
        ]
    )
    assert code == 0
    series = read_series(out)
    t = np.arange(11) * 0.1
    for run, row in zip(series.runs, data[[0, 9]]):  # rows evenly spaced through the file: 0 and 9
        z0 = (row - transform.mean_) / transform.scale_
        expected = transform.mean_ + transform.scale_ * z0 * np.exp(-t)[:, None]
        # RK4 at h = 1e-3 on a linear decay: relative error ~ h^4 / 120 per unit time, far below
        # the CSV round trip (shortest repr, lossless).
        np.testing.assert_allclose(run, expected, rtol=1e-10, atol=1e-12)


def test_simulate_reports_blowups_with_exit_code_1(tmp_path, capsys):
    model = tmp_path / "bad.json"
    lorenz63(extra_z2=1.0).to_json(model)
    rng = np.random.default_rng(22)
    start = tmp_path / "start.csv"
    starts = rng.normal(size=(6, 3)) * 3.0 + [0.0, 0.0, 25.0]
    write_csv(start, Series.from_arrays([starts], list(NAMES), 0.01))
    out = tmp_path / "sim.csv"
    code = main(
        [
            "simulate",
            str(model),
            "--members",
            "6",
            "--steps",
            "400",
            "--dt",
            "0.01",
            "--initial",
            str(start),
            "--out",
            str(out),
            "--seed",
            "1",
        ]
    )
    err = capsys.readouterr().err
    assert code == 1
    assert "6 of 6 members blew up" in err and "members that blew up: 0 (t=" in err
    series = read_series(out)
    # Runs end at their last finite output; none is padded or silently kept to full length.
    assert series.n_runs == 6 and all(0 < n < 400 for n in series.lengths)


def test_simulate_without_initial_states_stops_members_that_leave_the_fitted_range(
    tmp_path, capsys
):
    # x' = 1 from x0 = 0 (plus the 1e-3 start perturbations) is x(t) = t (analytic). With a recorded
    # training range [0, 1] the bound is ten half-ranges either side of the centre, [-4.5, 5.5]
    # (blowup_bound), so every member is stopped just after t = 5.5; without the record only an
    # overflow would stop it, and x stays finite over the 10 time units.
    drift = Surrogate(
        ("x",),
        (Term("monomial", (0,)),),
        [[1.0]],
        provenance={"dt": 0.01, "model_range": {"x": [0.0, 1.0]}},
    )
    bounded = tmp_path / "bounded.json"
    drift.to_json(bounded)
    out = tmp_path / "sim.npz"
    args = [
        "--members",
        "3",
        "--steps",
        "1000",
        "--spinup",
        "0",
        "--seed",
        "2",
        "--substep",
        "0.01",
    ]
    assert main(["simulate", str(bounded), *args, "--out", str(out)]) == 1
    err = capsys.readouterr().err
    assert "3 of 3 members blew up" in err
    series = read_series(out)
    assert series.n_runs == 3
    for run in series.runs:
        # The last output kept is the last one inside the bound: x within one output step of 5.5.
        assert 5.5 - 0.02 <= run[-1, 0] <= 5.5

    free = Surrogate(("x",), (Term("monomial", (0,)),), [[1.0]], provenance={"dt": 0.01})
    unbounded = tmp_path / "free.json"
    free.to_json(unbounded)
    assert main(["simulate", str(unbounded), *args, "--out", str(tmp_path / "free.npz")]) == 0
    assert read_series(tmp_path / "free.npz").runs[0][-1, 0] > 9.9


def test_simulate_without_initial_states_measures_stiffness_over_the_fitted_range(tmp_path, capsys):
    # x' = -x^3 starts calm at 0 but has |J| = 3 x^2 up to 300 over the recorded range [-10, 10]
    # (analytic): 256 uniform draws there reach |x| > 9.5 (probability of missing: 0.975^256 ~ 2e-3
    # per side), so the measured spectral radius exceeds 3 * 9.5^2 = 270.
    model = tmp_path / "cubic.json"
    Surrogate(
        ("x",),
        (Term("monomial", (3,)),),
        [[-1.0]],
        provenance={"dt": 0.1, "model_range": {"x": [-10.0, 10.0]}},
    ).to_json(model)
    assert (
        main(
            [
                "simulate",
                str(model),
                "--members",
                "2",
                "--steps",
                "5",
                "--spinup",
                "0",
                "--seed",
                "4",
                "--out",
                str(tmp_path / "sim.npz"),
            ]
        )
        == 0
    )
    err = capsys.readouterr().err
    rho = float(err.split("chosen from spectral radius ")[1].split(";")[0])
    assert 270.0 < rho <= 300.0


@pytest.mark.parametrize(
    ("extra", "match"),
    [
        (["--members", "0", "--steps", "5", "--dt", "0.1"], "--members"),
        (["--members", "2", "--steps", "5"], "--dt"),
        (["--members", "2", "--steps", "5", "--dt", "0.1", "--out", "x.txt"], "unknown extension"),
        (["--members", "2", "--steps", "5", "--dt", "-1"], "--dt"),
    ],
)
def test_simulate_refuses_bad_input_with_exit_code_2(tmp_path, capsys, extra, match):
    model = tmp_path / "model.json"
    lorenz63().to_json(model)
    extra = [str(tmp_path / e) if e.endswith(".txt") else e for e in extra]
    assert main(["simulate", str(model), *extra]) == 2
    err = capsys.readouterr().err
    assert match in err and len(err.strip().splitlines()) == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == ["model.json"]


def test_simulate_refuses_a_broken_model_file(tmp_path, capsys):
    model = tmp_path / "model.json"
    model.write_text(lorenz63().to_json().replace("ergodex-model/2", "ergodex-model/7"))
    out = tmp_path / "sim.npz"
    assert (
        main(
            [
                "simulate",
                str(model),
                "--members",
                "2",
                "--steps",
                "5",
                "--dt",
                "0.1",
                "--out",
                str(out),
            ]
        )
        == 2
    )
    assert "format" in capsys.readouterr().err and not out.exists()
    assert (
        main(
            [
                "simulate",
                str(tmp_path / "missing.json"),
                "--members",
                "2",
                "--steps",
                "5",
                "--dt",
                "0.1",
            ]
        )
        == 2
    )
    capsys.readouterr()
    # observed_variables naming a variable the model lacks: refused (exit 2), not a traceback
    odd = Surrogate(
        NAMES,
        lorenz63().terms,
        lorenz63().coefficients,
        settings={"observed_variables": ["flow", "pressure"]},
    )
    odd.to_json(model)
    assert (
        main(
            [
                "simulate",
                str(model),
                "--members",
                "2",
                "--steps",
                "5",
                "--dt",
                "0.1",
                "--out",
                str(out),
            ]
        )
        == 2
    )
    assert "observed_variables" in capsys.readouterr().err and not out.exists()


@pytest.mark.slow
def test_simulate_netcdf_and_stdout(tmp_path):
    pytest.importorskip("xarray")
    model = tmp_path / "model.json"
    lorenz63().to_json(model)
    out = tmp_path / "sim.nc"
    assert (
        main(
            [
                "simulate",
                str(model),
                "--members",
                "3",
                "--steps",
                "20",
                "--dt",
                "0.01",
                "--seed",
                "1",
                "--spinup",
                "2",
                "--out",
                str(out),
            ]
        )
        == 0
    )
    series = read_series(out)
    assert series.n_runs == 3 and series.lengths == (20,) * 3
    # A separate process, CSV on standard output, no progress bar off a terminal.
    proc = subprocess.run(
        [
            sys.executable,
            "-c",
            "import sys; from ergodex.cli import main; sys.exit(main())",
            "simulate",
            str(model),
            "--members",
            "2",
            "--steps",
            "3",
            "--dt",
            "0.01",
            "--seed",
            "1",
            "--spinup",
            "1",
        ],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert proc.returncode == 0, proc.stderr
    lines = proc.stdout.strip().splitlines()
    assert lines[0] == "time,run,flow,dT_across,dT_up" and len(lines) == 1 + 2 * 3
    assert "\r" not in proc.stderr


def test_simulate_a_model_with_a_hidden_level_writes_only_the_observed_variable(tmp_path):
    """A hidden red-noise level (as in empirical model reduction) is integrated but not written.

    dx = (-a x + r) dt, dr = -b r dt + s dW: the stationary covariance P solves
    A P + P A^T + Q = 0 (the Lyapunov equation; scipy.linalg.solve_continuous_lyapunov).
    """
    from scipy.linalg import solve_continuous_lyapunov

    a, b, s = 1.0, 2.0, 1.5
    terms = polynomial_terms(2, 1)  # 1, x, r
    coef = np.array([[0.0, -a, 1.0], [0.0, 0.0, -b]])
    noise = np.array([[0.0, 0.0], [0.0, s**2]])
    model = tmp_path / "model.json"
    Surrogate(
        ("x", "r_x"),
        terms,
        coef,
        kind="polynomial-sde",
        noise=noise,
        settings={"observed_variables": ["x"]},
    ).to_json(model)
    start = tmp_path / "start.csv"
    rng = np.random.default_rng(5)
    write_csv(start, Series.from_arrays([rng.normal(size=(80, 1))], ("x",), 0.05))
    out = tmp_path / "sim.npz"

    code = main(
        [
            "simulate",
            str(model),
            "--members",
            "64",
            "--steps",
            "2000",
            "--dt",
            "0.05",
            "--seed",
            "3",
            "--initial",
            str(start),
            "--spinup",
            "10",
            "--out",
            str(out),
        ]
    )
    assert code == 0
    series = read_series(out)
    assert series.names == ("x",)  # the hidden level is not data
    A = np.array([[-a, 1.0], [0.0, -b]])
    expected = solve_continuous_lyapunov(A, -noise)[0, 0]
    # 64 members x 100 time units, integrated time of x about 1/a + 1/b: relative sampling
    # error of the variance about sqrt(2 * 1.5 / 6400) = 2 %; allow 10 %.
    assert np.var(series.stacked()) == pytest.approx(expected, rel=0.10)
