"""The linear inverse model's default lag on a monthly record whose time is given in years.

Its documented default (``LinearInverseModel`` docstring): τ₀ is half the e-folding lag of the
mean autocorrelation of the model-space variables, at least one sample, in the data's own time
unit. A monthly record in years (dt = 1/12) must therefore fit with the default, at τ₀ a whole
number of months.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal

from ergodex.cli import main
from ergodex.series import Series
from ergodex.surrogate import Surrogate
from ergodex.writers import write_csv


def test_monthly_record_in_years_fits_with_the_default_lag(tmp_path, capsys):
    tsa = pytest.importorskip("statsmodels.tsa.stattools")
    rng = np.random.default_rng(71)
    dt = 1.0 / 12.0  # one month, in years
    e_folding = 6.5  # months: AR(1) coefficient exp(−1/6.5) (analytic OU sampling)
    a = math.exp(-1.0 / e_folding)
    runs = [
        scipy.signal.lfilter([1.0], [1.0, -a], rng.standard_normal((2, 3000)), axis=1).T
        for _ in range(3)
    ]
    write_csv(tmp_path / "monthly.csv", Series.from_arrays(runs, ("p", "q"), dt))
    out = tmp_path / "lim.json"
    code = main(
        ["fit", str(tmp_path / "monthly.csv"), "--method", "linear-inverse", "--out", str(out)]
    )
    assert code in (0, 1), capsys.readouterr().err  # never refused as bad input (2)
    assert out.exists(), capsys.readouterr().err
    tau0 = Surrogate.from_json(out).settings["tau0_used"]
    # reference library: statsmodels acf pooled over the variables; first lag below 1/e
    acf = np.mean([tsa.acf(np.concatenate([r[:, j] for r in runs]), nlags=30) for j in range(2)], 0)
    lag = int(np.flatnonzero(acf < math.exp(-1.0))[0])
    assert tau0 == pytest.approx(max(1, lag // 2) * dt, rel=1e-9)
    # analytic: the e-folding lag of exp(−k/6.5) is 7 months, so τ₀ is about 3 months
    assert abs(tau0 * 12 - 3) <= 1
