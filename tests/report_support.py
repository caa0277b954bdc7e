"""Real check results for the report tests: the convection-loop scenario checked by the validator.

Computed once per test process (``lru_cache``) because the report tests and the browser test both
need them and each check integrates sixteen members. Nothing here is invented: the reference is
the scenario's sensor data and the results come from :func:`ergodex.validation.check`.
"""

from __future__ import annotations

import functools

from ergodex import scenarios
from ergodex.regimes import RegimeSet
from ergodex.validation import CheckSpec, check

#: Seed of the demo (``ergodex demo``) so the page looks like the one users first see.
DEMO_SEED = 2026


@functools.cache
def loop_reference(seed: int = DEMO_SEED):
    """Held-out convection-loop runs, as in the demo (two runs; shorter to keep tests quick)."""
    return scenarios.convection_loop(seed=seed, n_runs=2, duration=40.0, dt=0.01)


@functools.cache
def loop_check(rho: float = 28.0, seed: int = DEMO_SEED):
    """``(CheckResult, Surrogate)`` of Lorenz-63 with the given rho against the loop's data.

    rho = 28 is the true system (it must pass). At rho = 22 the fixed points C+ and C- are
    stable (they lose stability at rho ~ 24.74; Lorenz 1963) and chaos is only transient
    (Kaplan & Yorke 1979; Sparrow 1982), so members spiral into C+ or C- and the histograms pile up
    near two values (it must fail).
    """
    reference = loop_reference(seed)
    regimes = RegimeSet.from_dict(scenarios.convection_loop_regimes())
    spec = CheckSpec(seed=seed, regimes=regimes)
    surrogate = scenarios.lorenz63_surrogate(rho=rho)
    return check(surrogate, reference, spec), surrogate


@functools.cache
def loop_page(rho: float = 28.0, seed: int = DEMO_SEED) -> str:
    """The rendered report of :func:`loop_check` (drawn once per process: figures take seconds)."""
    from ergodex.report import render_report

    result, surrogate = loop_check(rho, seed)
    return render_report(
        result, surrogate, title=f"Heated convection loop: Lorenz-63 with rho = {rho:g}"
    )
