"""Retraining on new data: re-check the accepted model, refit, keep the better one.

Observing systems and simulation campaigns keep producing data. :func:`retrain` takes the new data
and the registered model name and makes one documented decision:

1. **Split.** The new data are split into a fitting part and a held-out *reference* part
   (:func:`split_for_retrain`): whole runs when there are several, the last blocks of the run
   otherwise. Neither model is ever checked on the runs the refit was fitted on. The new
   data may list the incumbent's variables in any column order; they are put in its order first
   (:func:`ergodex.validation.align_columns`).
2. **Drift check.** The accepted version (the *incumbent*, the newest accepted version of the
   name) is checked against the reference with the seed given and the check spec recorded in its
   own scorecard (:func:`resolve_spec`; so the re-check repeats the check it was accepted on),
   or the spec given. An incumbent that fails has *drifted*: the system no longer behaves as the
   data it was accepted on.
3. **Refit.** A new model is fitted on the fitting part with the incumbent's recorded fit
   settings (its ``fit-settings`` file, else the method and settings its own model file records:
   :func:`fit_settings_from_model`), or the settings given, and checked against the *same*
   reference with the *same* spec and seed, so the two scorecards stand side by side on the same
   evidence.
4. **Register and decide.** The refit is always registered (as a candidate, with lineage:
   ``parent`` = the incumbent's version, ``datasets`` = fingerprints of the fitting and reference
   parts, ``fit-settings.json`` = what it was fitted with). Then:

   ============================  ==============================  ======================  =====
   incumbent                     refit                           outcome                 exit
   ============================  ==============================  ======================  =====
   none (first run)              passes                          ``first-accepted``      0
   none (first run)              fails                           ``no-acceptable-model`` 1
   passes the drift check        any                             ``kept``                0
   drifted                       passes, score <= incumbent's    ``replaced``            0
   drifted                       fails, or score > incumbent's   ``no-acceptable-model`` 1
   ============================  ==============================  ======================  =====

   An incumbent that still passes stays: a model fitted on a new sample of the same system is no
   better on this evidence than one that already matches it, and swapping models on sampling
   noise alone would make downstream results change for no reason. A refit that passes
   while the incumbent stands stays a *candidate* (a person may accept it); one that fails is
   *rejected* with its reasons. Every re-check leaves an event in the incumbent's history,
   ``drift-check-passed`` or ``drift-detected`` (with the score, the rows that failed and the
   data fingerprint); a passing refit that is not promoted gets ``not-promoted`` with the
   reason. An *inconclusive* check (the new record is too short to tell, or its runs disagree)
   is not a pass: it counts as "fails" / "drifted" in the table, the incumbent's event is then
   ``drift-check-inconclusive``, and the reasons say the record, not the model, was lacking.
   A name has one accepted version: promoting the refit retires the incumbent in the same
   registry transaction (event ``retired``, reason ``replaced by version N``); a
   drifted incumbent that is not replaced stays accepted. Nothing is ever deleted.

**The shared score** (:func:`shared_score`) is the scorecard's *largest row ratio*: the largest,
over every statistic × variable (or regime) row, of model distance ÷ reference noise floor. Lower is
better; 1 means "as far from the reference as two honest samples of the truth are from each
other". It is ``inf`` when more members blew up than the spec allows or a row ratio is not
finite, so a model that blows up is worse than any model that does not. The verdict itself is a
bound on this quantity, so "not worse on the shared score" compares like with like.

**Reproducibility.** Every check is seeded through ``seed`` (the check spec's seed); the fitters
are deterministic given their settings (an ensemble fit's own ``seed`` setting included). The
same registry state, data and seed give the same decision record, except the wall-clock times,
which :meth:`Decision.to_dict` keeps under their own key ``"times"`` and :meth:`Decision.record`
leaves out.

Caution: a passed statistical check is not a certification; before a surrogate informs decisions
that can hurt people, defer to the applicable codes, standards and licensed practice.
"""

from __future__ import annotations

import contextlib
import json
import logging
import math
import os
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

from ergodex import CAUTION
from ergodex.exceptions import DataError, ModelFileError, ModelLimitError, SettingsError
from ergodex.files import atomic_write_text
from ergodex.jsonable import jsonable
from ergodex.series import Series, split_blocks, split_runs
from ergodex.setting_names import FIT_SETTINGS_FORMAT
from ergodex.timestamps import utc_now

log = logging.getLogger(__name__)

#: Version tag of the decision record written by :meth:`Decision.to_dict`. Version 2 names the
#: two sides ``incumbent`` and ``refit``; :func:`upgrade_decision` still reads version 1.
DECISION_FORMAT = "ergodex-decision/2"
#: Earlier version tags :func:`upgrade_decision` reads, each with its side keys → today's keys
#: (the same words are the sides' ``role`` values).
OLD_DECISION_FORMATS: dict[str, dict[str, str]] = {
    "ergodex-decision/1": {"champion": "incumbent", "challenger": "refit"},
}

#: Outcomes, each with the exit code the command line returns for it.
OUTCOMES: dict[str, int] = {
    "first-accepted": 0,
    "kept": 0,
    "replaced": 0,
    "no-acceptable-model": 1,
}

#: Default share of the new data held out as the reference both models are checked against.
DEFAULT_HOLDOUT = 0.5

#: Fit settings used on a first run when no config is given.
DEFAULT_FIT: tuple[str, dict[str, Any]] = ("sparse", {})

SCORE_DEFINITION = (
    "largest row ratio (model distance / reference noise floor over all statistic x variable "
    "rows); lower is better; null (infinite) when more members blew up than allowed or a ratio "
    "is not finite"
)


# --- the decision record ------------------------------------------------------------------------
@dataclass
class ModelVerdict:
    """One side of the comparison: a model's check on the shared reference.

    Attributes
    ----------
    role : str
        ``"incumbent"`` or ``"refit"``.
    ref : str or None
        Registry reference ``"name/version"`` (``None`` only if nothing was registered).
    version : int or None
    verdict : str
        ``"pass"``, ``"fail"`` or ``"inconclusive"`` of the scorecard (only pass counts as
        passed).
    score : float
        :func:`shared_score` of the scorecard (``inf`` for a blow-up).
    reasons : list of str
        The scorecard's reasons (why it failed; empty when it passed).
    status : str or None
        Registry status after the decision (``accepted``, ``candidate``, ``rejected``).
    model_fingerprint : str
    blowups : int
        Members that blew up during the check.
    rows : list of dict
        Per-row ``statistic``, ``variable``, ``ratio``, ``verdict`` (side-by-side evidence).
    fit : dict or None
        For the refit: ``{"method": ..., "settings": {...}}`` it was fitted with.
    """

    role: str
    ref: str | None
    version: int | None
    verdict: str
    score: float
    reasons: list[str] = field(default_factory=list)
    status: str | None = None
    model_fingerprint: str = ""
    blowups: int = 0
    rows: list[dict[str, Any]] = field(default_factory=list)
    fit: dict[str, Any] | None = None

    @property
    def passed(self) -> bool:
        return self.verdict == "pass"

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict; a non-finite score is written as ``null``."""
        return {
            "role": self.role,
            "ref": self.ref,
            "version": self.version,
            "status": self.status,
            "verdict": self.verdict,
            "score": _json_float(self.score),
            "blowups": self.blowups,
            "reasons": list(self.reasons),
            "model_fingerprint": self.model_fingerprint,
            "fit": self.fit,
            "rows": [dict(r) for r in self.rows],
        }


@dataclass
class Decision:
    """The outcome of one :func:`retrain` call.

    Attributes
    ----------
    name : str
        Registry name of the model.
    outcome : str
        One of :data:`OUTCOMES`: ``"first-accepted"``, ``"kept"``, ``"replaced"``,
        ``"no-acceptable-model"``.
    standing : str or None
        The version ``Registry.load(name)`` returns after this decision: the refit when
        it was accepted, else the incumbent — with outcome ``no-acceptable-model`` that is the
        drifted incumbent, still loaded downstream until someone acts (hence exit code 1);
        ``None`` after a failed first run.
    incumbent, refit : ModelVerdict or None
        Both sides of the comparison (``incumbent`` is ``None`` on a first run).
    reasons : list of str
        Why the decision went this way, one sentence each.
    seed : int
        The seed every check used.
    holdout : object
        The holdout setting used (fraction, run count or run list), as given.
    data : dict
        ``fingerprint`` (all new data), ``fit_fingerprint``, ``reference_fingerprint``,
        ``source``, ``names``, ``dt``, ``n_runs``, ``fit_runs``, ``reference_runs``.
    spec : dict
        The check spec (``CheckSpec.to_dict()``), so the checks can be repeated exactly.
    started, finished : str
        Wall-clock times (ISO 8601, UTC); kept apart from the reproducible part.
    """

    name: str
    outcome: str
    standing: str | None
    incumbent: ModelVerdict | None
    refit: ModelVerdict | None
    reasons: list[str]
    seed: int
    holdout: Any
    data: dict[str, Any]
    spec: dict[str, Any]
    started: str = ""
    finished: str = ""

    @property
    def exit_code(self) -> int:
        """0 when an accepted model stands, 1 when no acceptable model exists (see OUTCOMES)."""
        return OUTCOMES[self.outcome]

    def record(self) -> dict[str, Any]:
        """The reproducible part of :meth:`to_dict` (everything but the wall-clock times)."""
        return {
            "format": DECISION_FORMAT,
            "name": self.name,
            "outcome": self.outcome,
            "exit_code": self.exit_code,
            "standing": self.standing,
            "incumbent": None if self.incumbent is None else self.incumbent.to_dict(),
            "refit": None if self.refit is None else self.refit.to_dict(),
            "reasons": list(self.reasons),
            "score_definition": SCORE_DEFINITION,
            "seed": self.seed,
            "holdout": jsonable(self.holdout),
            "data": dict(self.data),
            "spec": jsonable(self.spec),
            "caution": CAUTION,
        }

    def to_dict(self) -> dict[str, Any]:
        """The decision record (stable keys, documented here and in the module docs).

        Keys: ``format`` (``"ergodex-decision/2"``), ``name``, ``outcome``, ``exit_code``,
        ``standing``, ``incumbent`` and ``refit`` (each ``null`` or a dict with ``role``,
        ``ref``, ``version``, ``status``, ``verdict``, ``score``, ``blowups``, ``reasons``,
        ``model_fingerprint``, ``fit``, ``rows``), ``reasons``, ``score_definition``, ``seed``,
        ``holdout``, ``data``, ``spec``, ``caution``, and ``times`` (``started``, ``finished``:
        the only part that changes between identical runs).
        """
        out = self.record()
        out["times"] = {"started": self.started, "finished": self.finished}
        return out

    def to_json(self, path: str | os.PathLike[str] | None = None) -> str:
        """The decision record as indented JSON; with ``path``, also written there atomically."""
        text = json.dumps(self.to_dict(), indent=2, allow_nan=False) + "\n"
        if path is not None:
            atomic_write_text(path, text)
        return text

    def summary(self) -> str:
        """A few lines for people: outcome, both sides, what stands, why."""
        lines = [f"retrain {self.name}: {self.outcome} (exit code {self.exit_code})"]
        src = self.data.get("source") or "data"
        lines.append(f"  data       {src} ({self.data.get('fingerprint', '')[:19]}…)")
        for side in (self.incumbent, self.refit):
            if side is None:
                lines.append("  incumbent  (none: first run)")
                continue
            score = "inf" if not math.isfinite(side.score) else f"{side.score:.3g}"
            lines.append(
                f"  {side.role:<10} {side.ref or '-':<24} {side.verdict:<4}  score {score:<7}"
                f" {side.status or ''}"
            )
        lines.append(f"  standing   {self.standing or '(no accepted model)'}")
        lines.append(f"  (score: {SCORE_DEFINITION})")
        for reason in self.reasons:
            lines.append(f"  - {reason}")
        lines.append(f"  {CAUTION}")
        return "\n".join(lines)


def upgrade_decision(record: Mapping[str, Any], source: str = "decision record") -> dict[str, Any]:
    """A decision record of any version this ergodex reads, in today's shape.

    A version-1 record (``ergodex-decision/1``) names its sides ``champion`` and ``challenger``:
    they become ``incumbent`` and ``refit`` (keys and ``role`` values), and ``format`` becomes
    :data:`DECISION_FORMAT`. A record of today's version that still uses an old key was written
    by hand or by a broken tool and is refused, as is an unknown version.

    Raises
    ------
    ModelFileError
        One line naming ``source``, the format and the key.
    """
    fmt = record.get("format")
    old_keys = {old for renames in OLD_DECISION_FORMATS.values() for old in renames}
    if fmt == DECISION_FORMAT:
        for key in sorted(old_keys & set(record)):
            new = next(r[key] for r in OLD_DECISION_FORMATS.values() if key in r)
            raise ModelFileError(
                f"{source}: a {DECISION_FORMAT} record names its side {new!r}, not {key!r}; "
                f"rename the key {key!r} to {new!r}"
            )
        return dict(record)
    if fmt not in OLD_DECISION_FORMATS:
        raise ModelFileError(
            f"{source}: format {fmt!r} is not a decision record this ergodex reads "
            f"({', '.join([DECISION_FORMAT, *OLD_DECISION_FORMATS])})"
        )
    renames = OLD_DECISION_FORMATS[fmt]
    out: dict[str, Any] = {}
    for key, value in record.items():
        if key in renames:
            side = dict(value) if isinstance(value, Mapping) else value
            if isinstance(side, dict) and side.get("role") in renames:
                side["role"] = renames[side["role"]]
            out[renames[key]] = side
        else:
            out[key] = value
    out["format"] = DECISION_FORMAT
    return out


def read_decision(path: str | os.PathLike[str]) -> dict[str, Any]:
    """Read a decision record file (``--json`` of ``ergodex retrain``, ``*.decision.json`` of
    ``ergodex watch``) of any version this ergodex reads, in today's shape
    (:func:`upgrade_decision`)."""
    from ergodex.limits import load_json_text, read_text_file

    text = read_text_file(path, "decision record", error=ModelFileError)
    record = load_json_text(text, str(path), error=ModelFileError)
    if not isinstance(record, dict):
        raise ModelFileError(f"{path}: a decision record is a JSON object")
    return upgrade_decision(record, str(path))


# --- pieces -------------------------------------------------------------------------------------
def shared_score(scorecard: Any) -> float:
    """The score both models are compared on: the largest row ratio of a scorecard.

    Parameters
    ----------
    scorecard : ergodex.validation.Scorecard

    Returns
    -------
    float
        ``max(row.ratio)`` over the rows; ``inf`` when more members blew up than the spec
        allows, a ratio is not finite, or there are no rows. Lower is better.
    """
    blowups = _blowup_count(scorecard)
    spec = getattr(scorecard, "spec", None)
    allowed = 0.0
    if spec is not None:
        allowed = float(getattr(spec, "max_blowup_fraction", 0.0)) * int(
            getattr(spec, "members", 0)
        )
    if blowups > allowed:
        return math.inf
    ratios = [float(_row_get(row, "ratio")) for row in scorecard.rows]
    # A NaN ratio (no distance could be computed) fails its row, so it scores as the worst.
    if not ratios or not all(math.isfinite(r) for r in ratios):
        return math.inf
    return max(ratios)


def split_for_retrain(series: Series, holdout: Any = DEFAULT_HOLDOUT) -> tuple[Series, Series]:
    """Split new data into a fitting part and the held-out reference both models are checked on.

    Parameters
    ----------
    series : Series
    holdout : float, int or sequence
        A float in (0, 1): that share of the runs, counted from the end (at least one run held
        out and one kept); an int: that many runs from the end; a sequence: the held-out runs by
        position or label (as :func:`ergodex.series.split_runs`). With a single run, a float
        holds out that share of the run's end as blocks (:func:`ergodex.series.split_blocks`,
        ten blocks, no gap) and int or sequence values are refused.

    Returns
    -------
    (fit, reference) : tuple of Series
    """
    if isinstance(holdout, bool):
        raise SettingsError(
            f"holdout must be a fraction, a run count or a list of runs, got {holdout!r}"
        )
    if isinstance(holdout, float):
        if not 0.0 < holdout < 1.0:
            raise SettingsError(
                f"holdout fraction must be between 0 and 1 (exclusive), got {holdout!r}"
            )
        if series.n_runs >= 2:
            k = min(series.n_runs - 1, max(1, round(series.n_runs * holdout)))
            return split_runs(series, k)
        n_blocks = 10
        check_blocks = min(n_blocks - 1, max(1, round(n_blocks * holdout)))
        return split_blocks(series, n_blocks, 0.0, check_blocks=check_blocks)
    if series.n_runs < 2:
        raise DataError(
            f"{series.source or 'data'}: has a single run, so runs cannot be held out; "
            "give holdout as a fraction (e.g. 0.5) to hold out the end of the run"
        )
    return split_runs(series, holdout)


def fit_settings_from_model(surrogate: Any, *, source: str = "model") -> tuple[str, dict]:
    """``(method, settings)`` recorded in a fitted model's ``settings``.

    Every ergodex fitter writes ``method`` and its constructor settings into the model file,
    beside facts it learned (``tau0_used``, ``observed_variables``); only the keys of the
    method's settings table are kept, and they are checked like a fit-settings file.
    """
    from ergodex.fitting import fitter_class, parse_fit_settings

    recorded = dict(getattr(surrogate, "settings", None) or {})
    method = recorded.get("method")
    if not isinstance(method, str):
        raise SettingsError(
            f"{source} records no fit method in its settings, so it cannot be refitted "
            "from its own record; give fit settings (a TOML file with method and [settings])",
            python_hint="(config=...)",
            cli_hint="(use --config FILE)",
        )
    table = fitter_class(method).settings_table
    settings = {k: v for k, v in recorded.items() if k in table}
    return parse_fit_settings(
        {"method": method, "settings": settings}, source=f"fit settings recorded in {source}"
    )


def _resolve_fit(
    config: Any, registry: Any, incumbent_info: Any, incumbent: Any = None
) -> tuple[str, dict]:
    """(method, settings) for the refit: the config given, else the incumbent's record
    (its ``fit-settings`` file, else the settings in its model file)."""
    from ergodex.fitting import load_fit_settings, parse_fit_settings

    if config is not None:
        if isinstance(config, (str, os.PathLike)):
            return load_fit_settings(config)
        if isinstance(config, tuple) and len(config) == 2:
            method, settings = config
            return parse_fit_settings(
                {"method": method, "settings": dict(settings or {})}, source="config"
            )
        if isinstance(config, Mapping):
            return parse_fit_settings(config, source="config")
        raise SettingsError(
            "config must be a fit-settings TOML path, a (method, settings) pair or a mapping with "
            f"'method' and 'settings'; got {type(config).__name__}"
        )
    if incumbent_info is None:
        return DEFAULT_FIT[0], dict(DEFAULT_FIT[1])
    ref = incumbent_info.ref
    if "fit-settings.json" in incumbent_info.artifacts:
        text = registry.artifact(ref, "fit-settings.json").decode("utf-8")
        try:
            recorded = json.loads(text)
        except json.JSONDecodeError as exc:
            raise SettingsError(
                f"fit settings recorded with {ref} are not valid JSON: {exc}"
            ) from None
        if not isinstance(recorded, Mapping):
            raise SettingsError(f"fit settings recorded with {ref} are not a table: {recorded!r}")
        # recorded=True: a record without a format key was stored before the settings' renames
        return parse_fit_settings(
            recorded, source=f"fit settings recorded with {ref}", recorded=True
        )
    if "fit-settings.toml" in incumbent_info.artifacts:
        return load_fit_settings(registry.artifact_path(ref, "fit-settings.toml"), recorded=True)
    if incumbent is None:
        incumbent = registry.load(ref)
    return fit_settings_from_model(incumbent, source=ref)


def resolve_spec(spec: Any, registry: Any, incumbent_info: Any, seed: int) -> Any:
    """The check spec both models are checked with.

    ``spec`` given as a :class:`~ergodex.validation.CheckSpec` is used as it is. Otherwise the
    base is the spec recorded in the incumbent's scorecard (so the drift check repeats the check
    the incumbent was accepted on: same members, lengths, regimes, tolerances), or the default
    spec on a first run; a mapping given as ``spec`` overrides single settings of that base
    (``{"members": 8}``). The seed is always replaced by ``seed``.
    """
    from ergodex.validation import CheckSpec

    if isinstance(spec, CheckSpec):
        base = spec
    elif spec is None or isinstance(spec, Mapping):
        base = CheckSpec()
        if incumbent_info is not None and "scorecard.json" in incumbent_info.artifacts:
            recorded = json.loads(registry.artifact(incumbent_info.ref, "scorecard.json"))
            if isinstance(recorded, Mapping) and isinstance(recorded.get("spec"), Mapping):
                base = CheckSpec.from_dict(dict(recorded["spec"]))
                log.info("check spec: as recorded with %s", incumbent_info.ref)
        if spec:
            merged = base.to_dict()
            merged.update(dict(spec))
            base = CheckSpec.from_dict(merged)
    else:
        raise SettingsError(
            f"spec must be a CheckSpec or a mapping of settings, got {type(spec).__name__}"
        )
    out = replace(base, seed=seed)
    out.check_settings()
    return out


def find_incumbent(registry: Any, name: str) -> Any | None:
    """The newest accepted version of ``name`` (its ``VersionInfo``), or ``None`` if there is none.

    A name never registered, or registered without an accepted version, has no incumbent: the
    retrain is then a first run.
    """
    from ergodex.registry import format_ref, validate_name

    validate_name(name)
    for summary in registry.list_models():
        if summary.name == name:
            if summary.accepted is None:
                return None
            return registry.get(format_ref(name, summary.accepted))
    return None


def _verdict(
    role: str,
    scorecard: Any,
    *,
    ref: str | None,
    version: int | None,
    fit: dict[str, Any] | None = None,
) -> ModelVerdict:
    rows = []
    for row in scorecard.rows:
        rows.append(
            {
                "statistic": _row_get(row, "statistic"),
                "variable": _row_get(row, "variable"),
                "ratio": _json_float(float(_row_get(row, "ratio"))),
                "verdict": _row_get(row, "verdict"),
            }
        )
    return ModelVerdict(
        role=role,
        ref=ref,
        version=version,
        verdict=str(scorecard.verdict),
        score=shared_score(scorecard),
        reasons=[str(r) for r in scorecard.reasons],
        model_fingerprint=str(getattr(scorecard, "model_fingerprint", "")),
        blowups=_blowup_count(scorecard),
        rows=rows,
        fit=fit,
    )


# --- the main call ------------------------------------------------------------------------------
def retrain(
    registry: Any,
    name: str,
    data: Series | str | os.PathLike[str],
    *,
    config: Any = None,
    spec: Any = None,
    seed: int = 0,
    holdout: Any = DEFAULT_HOLDOUT,
    report: bool = True,
    progress: Any = False,
) -> Decision:
    """Re-check the accepted model on new data, refit and check the new model, and decide.

    Parameters
    ----------
    registry : ergodex.registry.Registry
    name : str
        Registry name of the model.
    data : Series, pandas.DataFrame, xarray.Dataset or path-like
        The new data (a path is read with :func:`ergodex.readers.read_series`, a table converted
        by :func:`ergodex.frames.as_series`).
    config : path-like, (method, settings) pair or mapping, optional
        Fit settings for the refit; default: the incumbent's recorded fit settings (its
        ``fit-settings`` file, else its model file's record; the sparse fitter's defaults on a
        first run).
    spec : ergodex.validation.CheckSpec or mapping, optional
        Check settings for both models (see :func:`resolve_spec`); a mapping overrides single
        settings of the default. The seed is always ``seed``.
    seed : int
        Seed of both checks (and so of the whole decision).
    holdout : float, int or sequence
        What to hold out as the shared reference (see :func:`split_for_retrain`).
    report : bool, default True
        Store the refit's HTML report in its version folder (a few seconds of plotting;
        an inbox that receives many files may turn it off).
    progress : bool or callable(done, total)
        Progress over the five steps (``read``, ``drift check``, ``refit``,
        ``register``, ``decide``; see :mod:`ergodex.progress`), each also logged. A callable of
        one argument is still called with the step's name before the step, as before.

    Returns
    -------
    Decision
        ``decision.exit_code`` is what the command line exits with.

    Raises
    ------
    DataError, SettingsError, RegistryError
        Bad input (unreadable data, variables that differ from the incumbent's, bad settings).
        Raised before anything is written to the registry.
    """
    started = utc_now()
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise SettingsError(f"seed must be a non-negative integer, got {seed!r}")
    with _steps(progress) as step:
        return _retrain(
            registry,
            name,
            data,
            config=config,
            spec=spec,
            seed=seed,
            holdout=holdout,
            report=report,
            step=step,
            started=started,
        )


_STEPS = ("read", "drift check", "refit", "register", "decide")


@contextlib.contextmanager
def _steps(progress: Any):
    """``step(name)`` for each of :data:`_STEPS`: logged, and passed on to ``progress``."""
    from ergodex.progress import reporter

    if callable(progress) and not isinstance(progress, bool) and _takes_one(progress):
        named = progress  # the older form: called with the step's name before the step
        progress = False
    else:
        named = None
    with reporter(progress, len(_STEPS), desc="retrain") as update:

        def step(name: str) -> None:
            log.info("retrain: %s", name)
            if named is not None:
                named(name)
            if update is not None and name in _STEPS:
                update(_STEPS.index(name), len(_STEPS))

        yield step
        if update is not None:
            update(len(_STEPS), len(_STEPS))


def _takes_one(function: Any) -> bool:
    """Whether ``function`` can be called with exactly one positional argument, not two."""
    import inspect

    try:
        signature = inspect.signature(function)
    except (TypeError, ValueError):
        return False
    try:
        signature.bind(0, 0)
        return False
    except TypeError:
        pass
    try:
        signature.bind("read")
        return True
    except TypeError:
        return False


def _retrain(
    registry: Any,
    name: str,
    data: Any,
    *,
    config: Any,
    spec: Any,
    seed: int,
    holdout: Any,
    report: bool,
    step: Callable[[str], None],
    started: str,
) -> Decision:
    """The body of :func:`retrain`; ``step(name)`` announces each step."""
    from ergodex.pipeline import fit_check_register
    from ergodex.validation import check

    step("read")
    series = _as_series(data)
    incumbent_info = find_incumbent(registry, name)
    incumbent_ref = None if incumbent_info is None else incumbent_info.ref
    incumbent = None if incumbent_info is None else registry.load(incumbent_ref)
    if incumbent is not None:
        assert incumbent_ref is not None  # an incumbent was loaded by its reference
        series = _check_variables(incumbent, series, incumbent_ref)
    fit_part, reference = split_for_retrain(series, holdout)
    log.info(
        "read %s: %d runs; fitting on %d, reference %d",
        series.source or "data",
        series.n_runs,
        fit_part.n_runs,
        reference.n_runs,
    )
    fingerprint = series.fingerprint()
    fit_fingerprint, reference_fingerprint = fit_part.fingerprint(), reference.fingerprint()

    method, settings = _resolve_fit(config, registry, incumbent_info, incumbent)
    spec = resolve_spec(spec, registry, incumbent_info, seed)

    step("drift check")
    incumbent_result = None
    incumbent_limit: str | None = None
    if incumbent is not None:
        log.info(
            "drift check: %s against %d reference runs (seed %d)",
            incumbent_ref,
            reference.n_runs,
            seed,
        )
        try:
            incumbent_result = check(incumbent, reference, spec, evidence=False)  # scorecard only
        except ModelLimitError as exc:  # too stiff or too slow on these data: a failed check
            incumbent_limit = str(exc)
            log.info("drift check: %s could not be integrated: %s", incumbent_ref, exc)
        else:
            log.info(
                "drift check: %s %s (score %.3g)",
                incumbent_ref,
                incumbent_result.scorecard.verdict,
                shared_score(incumbent_result.scorecard),
            )
    else:
        log.info("no accepted version of %s: first run", name)

    step("refit")
    log.info("refitting (%s) on %d runs", method, fit_part.n_runs)
    # The shared fit -> check path (no registry: registration, with lineage, is done below).
    fit_record = {"method": method, "settings": jsonable(settings)}
    try:
        flow = fit_check_register(fit_part, reference, method=method, settings=settings, spec=spec)
    except ModelLimitError as exc:
        # a refit too stiff or too slow to integrate is a failed refit, not a crash;
        # with no scorecard it is not registered
        step("register")
        step("decide")
        ch = ModelVerdict(
            role="refit",
            ref=None,
            version=None,
            verdict="fail",
            score=math.inf,
            reasons=[f"it could not be integrated: {exc}"],
            fit=fit_record,
        )
    else:
        step("register")
        info = _register_refit(
            registry,
            name,
            flow,
            series.source or "",
            fit_fingerprint,
            reference_fingerprint,
            fit_settings={"format": FIT_SETTINGS_FORMAT, "method": method, "settings": settings},
            parent=None if incumbent_info is None else incumbent_info.ref,
            seed=seed,
            report=report,
        )
        step("decide")
        ch = _verdict(
            "refit", flow.check.scorecard, ref=info.ref, version=info.version, fit=fit_record
        )
    log.info("refit %s: %s (score %.3g)", ch.ref, ch.verdict, ch.score)
    cp = None
    if incumbent_result is not None:
        assert incumbent_info is not None  # only an incumbent is re-checked
        cp = _verdict(
            "incumbent",
            incumbent_result.scorecard,
            ref=incumbent_ref,
            version=incumbent_info.version,
        )
    elif incumbent_limit is not None:
        assert (
            incumbent_info is not None and incumbent is not None
        )  # only an incumbent is re-checked
        cp = ModelVerdict(
            role="incumbent",
            ref=incumbent_ref,
            version=incumbent_info.version,
            verdict="fail",
            score=math.inf,
            reasons=[f"it could not be integrated: {incumbent_limit}"],
            model_fingerprint=incumbent.fingerprint(),
        )

    outcome, reasons = _decide(cp, ch)
    _apply(registry, outcome, cp, ch, reasons, fingerprint)
    standing = ch.ref if outcome in ("first-accepted", "replaced") else (cp.ref if cp else None)

    decision = Decision(
        name=name,
        outcome=outcome,
        standing=standing,
        incumbent=cp,
        refit=ch,
        reasons=reasons,
        seed=seed,
        holdout=holdout,
        data={
            "fingerprint": fingerprint,
            "fit_fingerprint": fit_fingerprint,
            "reference_fingerprint": reference_fingerprint,
            "source": series.source,
            "names": list(series.names),
            "dt": series.dt,
            "n_runs": series.n_runs,
            "fit_runs": fit_part.n_runs,
            "reference_runs": reference.n_runs,
        },
        spec=spec.to_dict(),
        started=started,
        finished=utc_now(),
    )
    log.info("decision for %s: %s; standing %s", name, outcome, standing or "(none)")
    return decision


def _register_refit(
    registry: Any,
    name: str,
    flow: Any,
    source: str,
    fit_fingerprint: str,
    reference_fingerprint: str,
    *,
    fit_settings: dict[str, Any],
    parent: str | None,
    seed: int,
    report: bool,
) -> Any:
    """Register the refit as a candidate with its evidence, lineage and data fingerprints."""
    from ergodex.pipeline import register_checked

    return register_checked(
        registry,
        name,
        flow.surrogate,
        flow.check,
        fit_settings=fit_settings,
        note=f"retrain refit on {source or 'new data'} (seed {seed})",
        parent=parent,
        datasets={
            "fit": {"fingerprint": fit_fingerprint, "source": source},
            "check": {"fingerprint": reference_fingerprint, "source": source},
        },
        title=f"{name}: retrain refit ({source or 'new data'})",
        report=report,
    )


def _decide(cp: ModelVerdict | None, ch: ModelVerdict) -> tuple[str, list[str]]:
    """The decision table of the module docs; returns (outcome, reasons)."""
    ch_score = _fmt(ch.score)
    if cp is None:
        if ch.passed:
            return "first-accepted", [
                (
                    "no accepted version existed; "
                    f"refit {ch.ref or '(not registered)'} passed its "
                    f"check (score {ch_score}) and was accepted"
                )
            ]
        return "no-acceptable-model", [
            "no accepted version existed and "
            f"refit {ch.ref or '(not registered)'} {_did_not_pass(ch)} "
            f"(score {ch_score}): " + _brief(ch.reasons)
        ]
    cp_score = _fmt(cp.score)
    if cp.passed:
        reasons = [f"incumbent {cp.ref} still passes on the new data (score {cp_score}); it stays"]
        if ch.passed:
            reasons.append(
                f"refit {ch.ref or '(not registered)'} also passed (score {ch_score}); "
                "left as a "
                "candidate, not promoted over an incumbent that still matches"
            )
        else:
            reasons.append(
                f"refit {ch.ref or '(not registered)'} {_did_not_pass(ch)} "
                f"(score {ch_score}): " + _brief(ch.reasons)
            )
        return "kept", reasons
    drift = (
        "failed the drift check"
        if cp.verdict != "inconclusive"
        else "had an inconclusive drift check"
    )
    reasons = [f"incumbent {cp.ref} {drift} (score {cp_score}): " + _brief(cp.reasons)]
    if ch.passed and ch.score <= cp.score:
        reasons.append(
            f"refit {ch.ref or '(not registered)'} passed "
            f"(score {ch_score} <= {cp_score}) and replaces it"
        )
        return "replaced", reasons
    if ch.passed:
        reasons.append(
            f"refit {ch.ref or '(not registered)'} passed but scored worse than the incumbent "
            f"({ch_score} > {cp_score}); not accepted"
        )
    else:
        reasons.append(
            f"refit {ch.ref or '(not registered)'} {_did_not_pass(ch)} (score {ch_score}): "
            + _brief(ch.reasons)
        )
    reasons.append("no acceptable model for the new data: downstream users must be warned")
    return "no-acceptable-model", reasons


def _did_not_pass(v: ModelVerdict) -> str:
    """How a verdict that is not a pass reads in a reason."""
    if v.verdict == "inconclusive":
        return "was inconclusive (the record cannot tell)"
    return "failed its check"


def _apply(
    registry: Any,
    outcome: str,
    cp: ModelVerdict | None,
    ch: ModelVerdict,
    reasons: list[str],
    data_fingerprint: str,
) -> None:
    """Write the decision into the registry: events and status changes (never deletions)."""
    on_data = f" [data {data_fingerprint}]"
    if cp is not None:
        # Every re-check of the incumbent leaves a line in its history, passed or not.
        event = (
            "drift-check-passed"
            if cp.passed
            else "drift-check-inconclusive"
            if cp.verdict == "inconclusive"
            else "drift-detected"
        )
        registry.record_event(cp.ref, event, reasons[0] + on_data)
    if outcome in ("first-accepted", "replaced"):
        why = (
            "first version: passed its check on held-out runs"
            if cp is None
            else f"retrain: replaces {cp.ref}, which failed the drift check; " + reasons[1]
        )
        registry.accept(ch.ref, reason=why + on_data)
        ch.status = "accepted"
    elif not ch.passed:
        if ch.ref is not None:  # a refit that could not be integrated was never registered
            registry.reject(
                ch.ref,
                reason=f"retrain refit {_did_not_pass(ch)}: " + _brief(ch.reasons) + on_data,
            )
            ch.status = "rejected"
    else:
        about = next((r for r in reasons if str(ch.ref) in r), reasons[-1])
        registry.record_event(ch.ref, "not-promoted", about + on_data)
        ch.status = _status(registry, ch.ref)
    if cp is not None:
        cp.status = _status(registry, cp.ref)


# --- small helpers ------------------------------------------------------------------------------
def _as_series(data: Any) -> Series:
    if isinstance(data, Series):
        return data
    if isinstance(data, (str, os.PathLike)):
        from ergodex.readers import read_series

        return read_series(data)
    from ergodex.frames import as_series

    return as_series(data, what="retrain data")


def _check_variables(surrogate: Any, series: Series, ref: str) -> Series:
    """The new data with its columns in the incumbent's order (the same variables in any order
    are accepted, as :func:`ergodex.validation.check` accepts them); other variables are bad
    input."""
    from ergodex.validation import align_columns

    try:
        return align_columns(surrogate, series)
    except DataError as exc:
        raise DataError(
            f"{exc} (the accepted version is {ref}; retrain needs new data of the same variables)"
        ) from None


def _status(registry: Any, ref: str | None) -> str | None:
    if ref is None:
        return None
    return str(registry.get(ref).status)


def _blowup_count(scorecard: Any) -> int:
    blowups = getattr(scorecard, "blowups", None) or {}
    if isinstance(blowups, Mapping):
        return int(blowups.get("count", 0) or 0)
    return int(blowups)


def _row_get(row: Any, key: str) -> Any:
    if isinstance(row, Mapping):
        return row.get(key)
    return getattr(row, key, None)


def _brief(reasons: Sequence[str], limit: int = 3) -> str:
    if not reasons:
        return "(no reason given)"
    shown = "; ".join(str(r) for r in reasons[:limit])
    more = len(reasons) - limit
    return shown + (f"; and {more} more" if more > 0 else "")


def _fmt(score: float) -> str:
    return "inf" if not math.isfinite(score) else f"{score:.3g}"


def _json_float(value: float) -> float | None:
    return value if math.isfinite(value) else None
