"""The main job as one call: fit → validate → register → accept, and the demo built on it.

The command line, the retraining loop and the HTTP service all go through
:func:`fit_check_register`, so that the three stages run the same way whoever asks.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ergodex.exceptions import SettingsError
from ergodex.setting_names import FIT_SETTINGS_FORMAT

log = logging.getLogger(__name__)


@dataclass
class FlowResult:
    """What :func:`fit_check_register` produced: the model, its check and where it was stored."""

    surrogate: Any
    check: Any
    fitter: Any
    name: str | None = None
    version: int | None = None
    status: str | None = None
    folder: Path | None = None
    extras: dict[str, Any] = field(default_factory=dict)

    @property
    def passed(self) -> bool:
        return bool(self.check.scorecard.passed)


def fit_check_register(
    fit_data: Any,
    check_data: Any,
    *,
    method: str = "sparse",
    settings: dict[str, Any] | None = None,
    spec: Any = None,
    registry: Any = None,
    name: str | None = None,
    accept: bool = True,
    note: str | None = None,
    parent: int | str | None = None,
    title: str | None = None,
    report: bool = True,
    progress: Any = False,
) -> FlowResult:
    """Fit a surrogate on ``fit_data``, check it against ``check_data``, register and accept it.

    Parameters
    ----------
    fit_data, check_data
        Runs to fit on and held-out runs to check against (never the same runs: a check on the
        fitting data flatters the model): Series, pandas DataFrames or xarray Datasets (see
        :func:`ergodex.frames.as_series`).
    method, settings
        Fitter name from :data:`ergodex.fitting.FITTERS` and its constructor settings.
    spec
        :class:`ergodex.validation.CheckSpec`; ``None`` uses the defaults.
    registry, name
        Where to register; with ``registry=None`` nothing is stored.
    accept
        Accept the new version when its scorecard passes (it stays a candidate otherwise).
    parent, title, report
        Lineage, report title, and whether to draw the report (see :func:`register_checked`).
    progress
        Progress of the fit and of the check (see :mod:`ergodex.progress`).
    """
    from ergodex.fitting import make_fitter
    from ergodex.frames import as_series
    from ergodex.validation import CheckSpec, check

    fit_data = as_series(fit_data, what="fit data")
    check_data = as_series(check_data, what="check data")
    if fit_data.names != check_data.names:
        raise SettingsError(
            f"fit data variables {list(fit_data.names)} differ from check data variables "
            f"{list(check_data.names)}; give both the same variables in the same order"
        )
    settings = dict(settings or {})
    spec = spec if spec is not None else CheckSpec()
    log.info("fitting %s on %d runs (%d samples)", method, fit_data.n_runs, fit_data.n_samples)
    fitter = make_fitter(method, settings).fit(fit_data, progress=progress)
    surrogate = fitter.surrogate_
    log.info("checking against %d held-out runs", check_data.n_runs)
    result = check(surrogate, check_data, spec, progress=progress)
    flow = FlowResult(surrogate=surrogate, check=result, fitter=fitter)
    if registry is None:
        return flow
    if name is None:
        raise SettingsError("a registry was given without a model name; pass name=...")

    info = register_checked(
        registry,
        name,
        surrogate,
        result,
        fit_settings={"format": FIT_SETTINGS_FORMAT, "method": method, "settings": settings},
        note=note,
        parent=parent,
        datasets={"fit": fit_data.fingerprint(), "check": check_data.fingerprint()},
        title=title or f"{name}: validation report",
        report=report,
    )
    flow.name, flow.version = info.name, info.version
    flow.folder = Path(info.folder)
    flow.status = info.status
    if accept and result.scorecard.passed:
        registry.accept(info.ref, reason="scorecard passed on held-out runs")
        flow.status = "accepted"
    log.info("registered %s (%s)", info.ref, flow.status)
    return flow


def register_checked(
    registry: Any,
    name: str,
    surrogate: Any,
    result: Any,
    *,
    fit_settings: dict[str, Any] | None = None,
    note: str | None = None,
    parent: int | str | None = None,
    datasets: Any = None,
    title: str | None = None,
    report: bool = True,
) -> Any:
    """Register a checked surrogate as a candidate with its scorecard, evidence and report.

    The evidence arrays go beside the model so that the report can be redrawn later
    (``ergodex report``); ``report=False`` skips drawing the page (it dominates the cost of a
    registration, which matters for inboxes receiving many files).
    """
    import tempfile

    html = None
    if report:
        from ergodex.report import render_report

        html = render_report(
            result, surrogate, title=title or f"{name}: validation report", fit_summary=fit_settings
        )
    with tempfile.TemporaryDirectory(prefix="ergodex-evidence-") as tmp:
        evidence_path = Path(tmp) / "evidence.npz"
        result.evidence.to_npz(evidence_path)
        info = registry.register(
            name,
            surrogate,
            scorecard=result.scorecard,
            report_html=html,
            evidence_path=evidence_path,
            fit_settings=fit_settings,
            note=note,
            parent=parent,
            datasets=datasets,
        )
    log.info(
        "registry %s: wrote %s (%s, scorecard %s) in %s",
        getattr(registry, "home", ""),
        info.ref,
        info.status,
        result.scorecard.verdict,
        info.folder,
    )
    return info


#: Demo scenarios: name -> sample dataset (and registry model) name.
DEMO_SCENARIOS: dict[str, str] = {"convection-loop": "convection-loop", "ring": "station-ring"}


@dataclass
class DemoResult:
    """Where the demo put things, and what it found."""

    flow: FlowResult
    dataset_folder: Path
    home: Path
    report_path: Path | None


def run_demo(
    *,
    scenario: str = "convection-loop",
    home: str | Path | None = None,
    data_root: str | Path = "datasets",
    seed: int | None = None,
    progress: Any = False,
) -> DemoResult:
    """Build the demo data, fit, validate, register and report, all under the current folder.

    ``convection-loop`` is a laboratory heated loop whose flow reverses at irregular times
    (three sensors); ``ring`` is a ring of 40 weather stations reduced to a few modes. The data
    go to ``<data_root>/<dataset>/`` exactly as the committed sample (same seed, same digits),
    are read back through the same reader a user's data goes through, fitted on the runs the
    manifest does not hold out, and checked on the held-out runs. ``progress`` is passed to the
    fit and the check (see :mod:`ergodex.progress`).
    """
    from ergodex import readers, scenarios
    from ergodex.registry import Registry
    from ergodex.validation import CheckSpec

    if scenario not in DEMO_SCENARIOS:
        raise SettingsError(
            f"unknown demo scenario {scenario!r}; choose one of {sorted(DEMO_SCENARIOS)}"
        )
    seed = scenarios.SAMPLE_SEED if seed is None else int(seed)
    dataset = DEMO_SCENARIOS[scenario]
    manifest = scenarios.write_sample_dataset(dataset, data_root, seed=seed)
    data = readers.read_dataset(Path(manifest).parent)
    fit_data, check_data = data.split()
    recipe = _demo_recipe(scenario)
    registry = Registry(home)
    flow = fit_check_register(
        fit_data,
        check_data,
        method=recipe["method"],
        settings=recipe["settings"],
        spec=CheckSpec(seed=seed, **recipe["spec"]),
        registry=registry,
        name=dataset,
        note=f"ergodex demo ({scenario}), seed {seed}",
        title=recipe["title"],
        progress=progress,
    )
    report = flow.folder / "report.html" if flow.folder is not None else None
    return DemoResult(
        flow=flow,
        dataset_folder=Path(manifest).parent,
        home=Path(registry.home),
        report_path=report,
    )


def _demo_recipe(scenario: str) -> dict[str, Any]:
    """Fitter and check settings of each demo scenario."""
    from ergodex import scenarios
    from ergodex.regimes import RegimeSet

    if scenario == "convection-loop":
        return {
            "method": "sparse",
            "settings": {},
            "spec": {"regimes": RegimeSet.from_dict(scenarios.convection_loop_regimes())},
            "title": "Heated convection loop: sparse ODE surrogate",
        }
    # A linear inverse model on the 10 leading modes (five travelling-wave pairs, half of the
    # variance), trained at a lag of 0.25 (about one station decorrelation time). On the sample's
    # held-out runs its largest ratio was 2.26-2.52 over five check seeds (true dynamics projected
    # on the same modes: about 1.9). It is not robust: regenerated with other seeds (--seed), the
    # same recipe failed 7 of 8 data sets (ratios 2.4-5.0, mostly the leading modes' variance,
    # which two training runs estimate to about 20 %). Quadratic drifts with white noise and
    # sparse models on 6-10 modes failed on every seed tried (autocorrelation, or blow-ups).
    return {
        "method": "linear-inverse",
        "settings": {"n_modes": 10, "tau0": 0.25},
        "spec": {},
        "title": "Ring of 40 weather stations: linear inverse model on 10 modes",
    }
