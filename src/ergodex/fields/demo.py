"""``ergodex demo --scenario basin``: fit → check on the grid → register → report, on a field.

The basin scenario (:mod:`ergodex.fields.basin`) is written as two CF NetCDF files under
``<data_root>/basin/`` (four fitting runs, two held-out runs), read back through the same reader
a modeler's file goes through, reduced to its leading area-weighted EOFs (monthly climatology
removed), fitted with a linear inverse model on the mode amplitudes, checked on the held-out
runs in mode space and on the grid, registered with a report that draws the maps, and accepted
when the check passes.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

from ergodex.pipeline import DemoResult, FlowResult

__all__ = ["BASIN_NAME", "run_basin_demo"]

BASIN_NAME = "basin-sst"


def run_basin_demo(
    *, scenario: str = "basin", home=None, data_root="datasets", seed: int | None = None
) -> DemoResult:
    """Build the basin data, fit, check on the grid, register, report; see the module docstring.

    ``scenario`` is accepted (and must be ``"basin"``) so that the call matches
    :func:`ergodex.pipeline.run_demo`.
    """
    if scenario != "basin":
        from ergodex.exceptions import SettingsError

        raise SettingsError(f"run_basin_demo runs the basin scenario, not {scenario!r}")
    from ergodex.fields import Box, FieldModes, modes_series, read_field
    from ergodex.fields.basin import BASIN_VARIABLE, write_basin
    from ergodex.fields.checking import check_field
    from ergodex.fields.maps import evidence_maps
    from ergodex.fields.modelling import attach_transform
    from ergodex.fitting import make_fitter
    from ergodex.registry import Registry
    from ergodex.report import render_report
    from ergodex.scenarios import SAMPLE_SEED
    from ergodex.setting_names import FIT_SETTINGS_FORMAT
    from ergodex.validation import CheckSpec

    seed = SAMPLE_SEED if seed is None else int(seed)
    folder = Path(data_root) / "basin"
    fit_path, check_path = write_basin(folder, seed=seed)
    fit_field = read_field(fit_path, BASIN_VARIABLE)
    check_data = read_field(check_path, BASIN_VARIABLE)
    transform = FieldModes(variance=0.9, climatology="month").fit(fit_field)
    fit_modes = modes_series(transform, fit_field)
    settings: dict = {}
    fitter = make_fitter("linear-inverse", settings).fit(fit_modes)
    summary = transform.summary()
    surrogate = attach_transform(
        fitter.surrogate_,
        transform,
        field={
            "source": fit_path.name,
            "variable": BASIN_VARIABLE,
            "time_unit": summary["time_unit"],
            "dt": summary["dt"],
            "calendar": summary["calendar"],
            "n_modes": summary["n_modes"],
            "variance_captured": summary["variance_captured"],
        },
    )
    spec = CheckSpec(seed=seed)
    field_check = check_field(surrogate, check_data, spec, regions=[Box(10.0, 25.0, 300.0, 340.0)])
    result = field_check.result
    title = (
        f"Ocean basin SST: linear inverse model on {transform.n_modes_} EOF modes "
        f"(dt {transform.dt_text})"
    )
    html = render_report(
        result,
        surrogate,
        title=title,
        fit_summary={"method": "linear-inverse", "settings": settings, "reduction": summary},
        extra_sections=field_check.report_sections(),
    )
    registry = Registry(home)
    with tempfile.TemporaryDirectory(prefix="ergodex-evidence-") as tmp:
        evidence = Path(tmp) / "evidence.npz"
        result.evidence.to_npz(evidence, extra=evidence_maps(field_check))
        info = registry.register(
            BASIN_NAME,
            surrogate,
            scorecard=result.scorecard,
            report_html=html,
            evidence_path=evidence,
            # What retrain refits with: a fit-settings document as `fit --config` reads it. The
            # reduction is not a fit setting; the model file carries it (its transform).
            fit_settings={
                "format": FIT_SETTINGS_FORMAT,
                "method": "linear-inverse",
                "settings": settings,
            },
            note=f"ergodex demo (basin), seed {seed}",
            datasets={
                "fit": fit_modes.fingerprint(),
                "check": modes_series(transform, check_data).fingerprint(),
            },
        )
    flow = FlowResult(
        surrogate=surrogate,
        check=result,
        fitter=fitter,
        name=info.name,
        version=info.version,
        status=info.status,
        folder=Path(info.folder),
    )
    if result.scorecard.passed:
        registry.accept(
            info.ref,
            reason="scorecard passed on held-out runs (modes and grid)",
        )
        flow.status = "accepted"
    assert flow.folder is not None  # set just above
    return DemoResult(
        flow=flow,
        dataset_folder=folder,
        home=Path(registry.home),
        report_path=flow.folder / "report.html",
    )
