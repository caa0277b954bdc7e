"""Surrogate dynamics as a declarative term table: the object every other module integrates.

A :class:`Surrogate` is ``dx/dt = C @ theta(x) (+ white noise)``: a tuple of typed terms
``theta`` (monomials given by integer power vectors, or the sine/cosine of one variable), a
coefficient matrix ``C`` of shape (n_variables, n_terms), an optional covariance of additive white
noise per unit time, and an optional transform from data space to model space.

The object is plain data on purpose: it is written to ``model.json`` as JSON that any language can
read, and loading a file can never execute code (unlike a pickled fitted model). The JSON round
trip is exact: coefficients are written with Python's shortest repr of each float, which reads back
to the identical double.

Numerics here are vectorised numpy over many states at once; the compiled ensemble kernels live in
:mod:`ergodex.kernels` and read the same term table.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from itertools import combinations_with_replacement
from pathlib import Path
from typing import Any

import numpy as np

from ergodex.exceptions import ErgodexError, ModelFileError, SettingsError

__all__ = [
    "FORMAT",
    "OLD_FORMAT",
    "TERM_KINDS",
    "Term",
    "Surrogate",
    "polynomial_terms",
    "from_pysindy",
]

#: Version string written to the ``format`` field of ``model.json``.
FORMAT = "ergodex-model/2"
#: The version before the fit settings got names of ergodex's own: still read, its recorded
#: settings mapped to the new names (:mod:`ergodex.setting_names`).
OLD_FORMAT = "ergodex-model/1"

#: Largest total degree of a monomial in a model file. Fitters write degree 5 at most; far higher
#: powers overflow at ordinary states and make each evaluation slow.
MAX_DEGREE = 32
#: Largest coefficient magnitude (and sine/cosine frequency) in a model file: 1e100. Beyond it
#: one term overflows double precision (1.8e308) at states of order 1e2 in a single evaluation.
MAX_COEFFICIENT = 1e100

#: Kinds of terms a surrogate can hold.
TERM_KINDS = ("monomial", "sin", "cos")

_TOP_LEVEL_REQUIRED = ("format", "kind", "variables", "terms", "coefficients")
_TOP_LEVEL_OPTIONAL = ("noise", "transform", "settings", "provenance")


@dataclass(frozen=True)
class Term:
    """One candidate function of the state.

    Parameters
    ----------
    kind : {"monomial", "sin", "cos"}
        ``monomial``: ``prod_j x_j ** powers[j]``; ``sin``/``cos``:
        ``sin(frequency * x[variable])``.
    powers : tuple of int
        Monomial exponents, one non-negative integer per variable (all zero: the constant 1).
    variable : int
        Index of the variable inside ``sin``/``cos``; unused (-1) for monomials.
    frequency : float
        Angular frequency inside ``sin``/``cos``.
    """

    kind: str
    powers: tuple[int, ...] = ()
    variable: int = -1
    frequency: float = 1.0

    def __post_init__(self) -> None:
        if self.kind not in TERM_KINDS:
            raise SettingsError(
                f"term kind {self.kind!r} is not supported; use one of {', '.join(TERM_KINDS)}"
            )
        object.__setattr__(self, "powers", tuple(int(p) for p in self.powers))
        if self.kind == "monomial":
            if any(p < 0 for p in self.powers):
                raise SettingsError(f"monomial powers must be non-negative, got {self.powers}")
        else:
            if not math.isfinite(float(self.frequency)):
                raise SettingsError(
                    f"{self.kind} term frequency must be finite, got {self.frequency}"
                )
            object.__setattr__(self, "frequency", float(self.frequency))
            object.__setattr__(self, "variable", int(self.variable))

    @property
    def degree(self) -> int:
        """Total degree of a monomial (0 for the constant); 0 for sin/cos."""
        return sum(self.powers) if self.kind == "monomial" else 0

    def label(self, names: Sequence[str]) -> str:
        """Readable name such as ``flow dT_up``, ``flow^2``, ``1`` or ``sin(2 flow)``."""
        if self.kind == "monomial":
            parts = [
                names[j] if p == 1 else f"{names[j]}^{p}"
                for j, p in enumerate(self.powers)
                if p > 0
            ]
            return " ".join(parts) if parts else "1"
        freq = "" if self.frequency == 1.0 else f"{self.frequency:g} "
        return f"{self.kind}({freq}{names[self.variable]})"

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready entry of the ``terms`` list."""
        if self.kind == "monomial":
            return {"kind": "monomial", "powers": list(self.powers)}
        return {"kind": self.kind, "variable": self.variable, "frequency": self.frequency}


def polynomial_terms(
    n_variables: int, degree: int, *, include_bias: bool = True
) -> tuple[Term, ...]:
    """All monomials up to ``degree``, in the order pysindy's ``PolynomialLibrary`` uses.

    The order is by total degree, then lexicographic in the variable indices
    (``1, x0, x1, x2, x0^2, x0 x1, x0 x2, x1^2, …``), so that a coefficient table fitted by
    pysindy lines up column by column.

    Parameters
    ----------
    n_variables : int
        Number of state variables (> 0).
    degree : int
        Largest total degree (>= 0).
    include_bias : bool, default True
        Whether the constant term comes first.

    Returns
    -------
    tuple of Term
        ``comb(n_variables + degree, degree)`` terms with the constant, one fewer without.
    """
    if int(n_variables) <= 0:
        raise SettingsError(f"n_variables must be positive, got {n_variables}")
    if int(degree) < 0:
        raise SettingsError(f"degree must be non-negative, got {degree}")
    terms = []
    for d in range(0 if include_bias else 1, int(degree) + 1):
        for combo in combinations_with_replacement(range(int(n_variables)), d):
            powers = [0] * int(n_variables)
            for j in combo:
                powers[j] += 1
            terms.append(Term("monomial", tuple(powers)))
    return tuple(terms)


def _json_ready(value: Any, field: str) -> Any:
    """Convert numpy scalars/arrays inside settings or provenance to plain JSON values."""
    if isinstance(value, Mapping):
        out = {}
        for key, item in value.items():
            if not isinstance(key, str):
                raise SettingsError(f"{field}: keys must be strings, got {key!r}")
            out[key] = _json_ready(item, f"{field}.{key}")
        return out
    if isinstance(value, (list, tuple)):
        return [_json_ready(item, field) for item in value]
    if isinstance(value, np.ndarray):
        return _json_ready(value.tolist(), field)
    if isinstance(value, np.generic):
        return _json_ready(value.item(), field)
    if isinstance(value, float) and not math.isfinite(value):
        raise SettingsError(f"{field}: non-finite number {value!r} cannot be written to JSON")
    if value is None or isinstance(value, (str, bool, int, float)):
        return value
    raise SettingsError(
        f"{field}: value {value!r} of type {type(value).__name__} cannot be written to JSON"
    )


class Surrogate:
    """Surrogate dynamics ``dx/dt = C theta(x)`` plus optional additive white noise.

    Parameters
    ----------
    variables : sequence of str
        Names of the model-space state variables (unique, non-empty).
    terms : sequence of Term
        The candidate functions ``theta``.
    coefficients : array_like, shape (n_variables, n_terms)
        Finite coefficients; row ``i`` is the equation of ``variables[i]``.
    kind : str, default "polynomial-ode"
        What family the model belongs to (e.g. ``"polynomial-ode"``, ``"linear-stochastic"``,
        ``"quadratic-stochastic"``); descriptive only, the dynamics are fixed by the terms.
    noise : array_like, shape (n_variables, n_variables), optional
        Covariance of additive white noise per unit time (symmetric positive semi-definite):
        over a step ``h`` the noise increment has covariance ``noise * h``.
    transform : Transform, optional
        Maps data space to model space (``forward``) and back (``inverse``).
    settings : dict, optional
        Settings of the fitter that produced the model (JSON values).
    provenance : dict, optional
        Where the model came from: data fingerprints, package versions, time (JSON values).

    Raises
    ------
    SettingsError
        Naming the argument when a shape, a value or a name breaks a rule.

    Notes
    -----
    Instances are immutable: the coefficient and noise arrays are read-only copies.
    """

    def __init__(
        self,
        variables: Sequence[str],
        terms: Sequence[Term],
        coefficients: Any,
        *,
        kind: str = "polynomial-ode",
        noise: Any = None,
        transform: Any = None,
        settings: Mapping[str, Any] | None = None,
        provenance: Mapping[str, Any] | None = None,
    ) -> None:
        if isinstance(variables, str) or not isinstance(variables, Sequence):
            raise SettingsError(f"variables must be a list of names, got {variables!r}")
        variables = tuple(variables)
        if not variables:
            raise SettingsError("variables: at least one variable is needed")
        for name in variables:
            if not isinstance(name, str) or not name.strip():
                raise SettingsError(
                    f"variables: every name must be a non-empty string, got {name!r}"
                )
        if len(set(variables)) != len(variables):
            dupes = sorted({v for v in variables if variables.count(v) > 1})
            raise SettingsError(f"variables: names must be unique, repeated: {', '.join(dupes)}")
        n = len(variables)

        terms = tuple(terms)
        if not terms:
            raise SettingsError("terms: at least one term is needed")
        for t, term in enumerate(terms):
            if not isinstance(term, Term):
                raise SettingsError(f"terms[{t}]: expected a Term, got {term!r}")
            if term.kind == "monomial" and len(term.powers) != n:
                raise SettingsError(
                    f"terms[{t}]: monomial has {len(term.powers)} powers, expected {n} (one per "
                    "variable)"
                )
            if term.kind != "monomial" and not 0 <= term.variable < n:
                raise SettingsError(
                    f"terms[{t}]: {term.kind} variable index {term.variable} is outside 0..{n - 1}"
                )
        if len(set(terms)) != len(terms):
            raise SettingsError("terms: the same term appears twice; merge its coefficients")

        try:
            coef = np.array(coefficients, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise SettingsError(f"coefficients: not a numeric matrix ({exc})") from None
        if coef.shape != (n, len(terms)):
            raise SettingsError(
                f"coefficients: shape {coef.shape}, expected ({n}, {len(terms)}) "
                "(n_variables x n_terms)"
            )
        if not np.all(np.isfinite(coef)):
            i, t = np.argwhere(~np.isfinite(coef))[0]
            raise SettingsError(
                f"coefficients: non-finite value {coef[i, t]} at row {i}, column {t}"
            )
        if np.any(np.abs(coef) > MAX_COEFFICIENT):
            i, t = np.argwhere(np.abs(coef) > MAX_COEFFICIENT)[0]
            raise SettingsError(
                f"coefficients: value {coef[i, t]:.3g} at row {i}, column {t} is beyond "
                f"the largest allowed magnitude {MAX_COEFFICIENT:g}"
            )
        coef.setflags(write=False)

        noise_arr = None
        if noise is not None:
            try:
                noise_arr = np.array(noise, dtype=np.float64)
            except (TypeError, ValueError) as exc:
                raise SettingsError(f"noise: not a numeric matrix ({exc})") from None
            if noise_arr.shape != (n, n):
                raise SettingsError(f"noise: shape {noise_arr.shape}, expected ({n}, {n})")
            if not np.all(np.isfinite(noise_arr)):
                raise SettingsError("noise: the covariance has non-finite entries")
            scale = max(float(np.max(np.abs(noise_arr))), np.finfo(float).tiny)
            if not np.allclose(noise_arr, noise_arr.T, rtol=0.0, atol=1e-12 * scale):
                raise SettingsError("noise: the covariance must be symmetric")
            smallest = float(np.linalg.eigvalsh(noise_arr).min())
            # Round-off in a fitted covariance can leave tiny negative eigenvalues; anything beyond
            # a few ulps of the largest entry is a real error.
            if smallest < -1e-10 * scale:
                raise SettingsError(
                    "noise: the covariance must be positive semi-definite, smallest eigenvalue "
                    f"{smallest:.3g}"
                )
            noise_arr.setflags(write=False)

        if not isinstance(kind, str) or not kind.strip():
            raise SettingsError(f"kind: must be a non-empty string, got {kind!r}")
        if transform is not None and not all(
            hasattr(transform, attr) for attr in ("forward", "inverse", "to_dict")
        ):
            raise SettingsError(
                "transform: expected an ergodex Transform (forward/inverse/to_dict), got "
                f"{type(transform).__name__}"
            )
        for field, value in (("settings", settings), ("provenance", provenance)):
            if value is not None and not isinstance(value, Mapping):
                raise SettingsError(f"{field}: must be a dict, got {type(value).__name__}")
        observed_index = None
        if transform is not None:
            try:
                n_out = int(transform.n_outputs)
            except (AttributeError, ErgodexError):
                n_out = n
            if n_out != n:
                observed_index = _observed_index(transform, variables, settings)

        self._variables = variables
        self._terms = terms
        self._coefficients = coef
        self._noise = noise_arr
        self._kind = kind
        self._transform = transform
        self._settings = _json_ready(dict(settings or {}), "settings")
        self._provenance = _json_ready(dict(provenance or {}), "provenance")
        self._tables: dict[str, Any] | None = None
        # Model columns the transform produces, when the model also has hidden variables.
        self._observed_index = observed_index

    # ------------------------------------------------------------------ read-only attributes
    variables = property(lambda self: self._variables, doc="Names of the model-space variables.")
    terms = property(lambda self: self._terms, doc="The term table, one Term per column of C.")
    coefficients = property(
        lambda self: self._coefficients, doc="(n_variables, n_terms), read-only."
    )
    noise = property(lambda self: self._noise, doc="Noise covariance per unit time, or None.")
    transform = property(
        lambda self: self._transform, doc="Data -> model space transform, or None."
    )
    kind = property(lambda self: self._kind, doc="Model family (descriptive).")

    @property
    def settings(self) -> dict[str, Any]:
        """Fitter settings (a copy)."""
        return json.loads(json.dumps(self._settings))

    @property
    def provenance(self) -> dict[str, Any]:
        """Provenance record (a copy)."""
        return json.loads(json.dumps(self._provenance))

    @property
    def n_variables(self) -> int:
        return len(self._variables)

    @property
    def n_terms(self) -> int:
        return len(self._terms)

    @property
    def is_stochastic(self) -> bool:
        """True when the model has a noise covariance with any non-zero entry."""
        return self._noise is not None and bool(np.any(self._noise != 0.0))

    def __repr__(self) -> str:
        return (
            f"Surrogate(kind={self._kind!r}, variables={list(self._variables)}, "
            f"n_terms={self.n_terms}, nonzero={int(np.count_nonzero(self._coefficients))}, "
            f"stochastic={self.is_stochastic})"
        )

    def _repr_html_(self) -> str:
        """A small table for notebooks: kind, variables, terms, noise, the first equations."""
        from ergodex.display import surrogate_html

        return surrogate_html(self)

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Surrogate) and self.fingerprint() == other.fingerprint()

    def __hash__(self) -> int:
        return hash(self.fingerprint())

    # ------------------------------------------------------------------ term tables
    def term_tables(self) -> dict[str, np.ndarray]:
        """Compact arrays describing the active terms (those with a non-zero coefficient).

        Used by the numpy evaluation below and by the compiled kernels, so both evaluate exactly
        the same sparse set of terms.

        Returns
        -------
        dict
            ``active`` (n_active,) term indices; ``kind`` (n_active,) int8 (0 monomial, 1 sin,
            2 cos); ``powers`` (n_active, n_variables) int64; ``variable`` (n_active,) int64;
            ``frequency`` (n_active,) float64; ``factor_ptr``/``factor_var``/``factor_pow``: the
            non-zero powers of each active monomial in compressed-row form;
            ``coef_ptr``/``coef_target``/``coef_value``: the non-zero coefficients of each active
            term (which equations it enters, with what weight) in compressed-row form.
        """
        if self._tables is None:
            coef = self._coefficients
            active = np.flatnonzero(np.any(coef != 0.0, axis=0)).astype(np.int64)
            n = self.n_variables
            kinds = np.array([TERM_KINDS.index(self._terms[t].kind) for t in active], dtype=np.int8)
            powers = np.zeros((len(active), n), dtype=np.int64)
            variable = np.zeros(len(active), dtype=np.int64)
            frequency = np.ones(len(active), dtype=np.float64)
            factor_ptr = [0]
            factor_var: list[int] = []
            factor_pow: list[int] = []
            coef_ptr = [0]
            coef_target: list[int] = []
            coef_value: list[float] = []
            for a, t in enumerate(active):
                term = self._terms[t]
                if term.kind == "monomial":
                    powers[a] = term.powers
                    for j, p in enumerate(term.powers):
                        if p:
                            factor_var.append(j)
                            factor_pow.append(p)
                else:
                    variable[a] = term.variable
                    frequency[a] = term.frequency
                factor_ptr.append(len(factor_var))
                for i in np.flatnonzero(coef[:, t]):
                    coef_target.append(int(i))
                    coef_value.append(float(coef[i, t]))
                coef_ptr.append(len(coef_target))
            self._tables = {
                "active": active,
                "kind": kinds,
                "powers": powers,
                "variable": variable,
                "frequency": frequency,
                "factor_ptr": np.array(factor_ptr, dtype=np.int64),
                "factor_var": np.array(factor_var, dtype=np.int64),
                "factor_pow": np.array(factor_pow, dtype=np.int64),
                "coef_ptr": np.array(coef_ptr, dtype=np.int64),
                "coef_target": np.array(coef_target, dtype=np.int64),
                "coef_value": np.array(coef_value, dtype=np.float64),
            }
            for arr in self._tables.values():
                arr.setflags(write=False)
        return self._tables

    def _check_states(self, states: Any) -> tuple[np.ndarray, bool]:
        x = np.asarray(states, dtype=np.float64)
        single = x.ndim == 1
        if single:
            x = x[None, :]
        if x.ndim != 2 or x.shape[1] != self.n_variables:
            raise SettingsError(
                f"states: shape {np.shape(states)}, expected (M, {self.n_variables}) or "
                f"({self.n_variables},)"
            )
        return x, single

    def _features(self, x: np.ndarray, which: np.ndarray) -> np.ndarray:
        """Evaluate terms ``which`` at states ``x`` (M, n) -> (M, len(which))."""
        out = np.empty((x.shape[0], len(which)), dtype=np.float64)
        for col, t in enumerate(which):
            term = self._terms[t]
            if term.kind == "monomial":
                val = np.ones(x.shape[0])
                for j, p in enumerate(term.powers):
                    if p == 1:
                        val = val * x[:, j]
                    elif p > 1:
                        val = val * x[:, j] ** p
                out[:, col] = val
            elif term.kind == "sin":
                out[:, col] = np.sin(term.frequency * x[:, term.variable])
            else:
                out[:, col] = np.cos(term.frequency * x[:, term.variable])
        return out

    def features(self, states: Any) -> np.ndarray:
        """Values of every term at the given states.

        Parameters
        ----------
        states : array_like, shape (M, n_variables) or (n_variables,)

        Returns
        -------
        ndarray, shape (M, n_terms) (or (n_terms,) for a single state)
        """
        x, single = self._check_states(states)
        out = self._features(x, np.arange(self.n_terms))
        return out[0] if single else out

    def rhs(self, states: Any) -> np.ndarray:
        """Deterministic tendency ``C theta(x)`` at many states at once.

        Only terms with a non-zero coefficient are evaluated.

        Parameters
        ----------
        states : array_like, shape (M, n_variables) or (n_variables,)

        Returns
        -------
        ndarray, same shape as ``states``
        """
        x, single = self._check_states(states)
        active = self.term_tables()["active"]
        theta = self._features(x, active)
        out = theta @ self._coefficients[:, active].T
        return out[0] if single else out

    def jacobian(self, states: Any) -> np.ndarray:
        """Jacobian ``d rhs_i / d x_k`` of the deterministic part at many states.

        Parameters
        ----------
        states : array_like, shape (M, n_variables) or (n_variables,)

        Returns
        -------
        ndarray, shape (M, n_variables, n_variables) (or (n, n) for a single state)
        """
        x, single = self._check_states(states)
        m, n = x.shape
        active = self.term_tables()["active"]
        # dtheta[m, a, k] = d theta_a / d x_k
        dtheta = np.zeros((m, len(active), n))
        for col, t in enumerate(active):
            term = self._terms[t]
            if term.kind == "monomial":
                for k, pk in enumerate(term.powers):
                    if pk == 0:
                        continue
                    val = np.full(m, float(pk))
                    for j, p in enumerate(term.powers):
                        q = p - 1 if j == k else p
                        if q == 1:
                            val = val * x[:, j]
                        elif q > 1:
                            val = val * x[:, j] ** q
                    dtheta[:, col, k] = val
            else:
                v, f = term.variable, term.frequency
                if term.kind == "sin":
                    dtheta[:, col, v] = f * np.cos(f * x[:, v])
                else:
                    dtheta[:, col, v] = -f * np.sin(f * x[:, v])
        jac = np.einsum("ia,mak->mik", self._coefficients[:, active], dtheta)
        return jac[0] if single else jac

    # ------------------------------------------------------------------ display
    def equations(self, precision: int = 4) -> list[str]:
        """Readable equations, one per variable, e.g. ``d flow/dt = -10 flow + 10 dT_across``.

        Derived from the term table for display only; never parsed back.

        Parameters
        ----------
        precision : int, default 4
            Significant digits of each coefficient.
        """
        lines = []
        names = self._variables
        noisy = None if self._noise is None else np.diag(self._noise) > 0.0
        for i, name in enumerate(names):
            parts: list[str] = []
            for t in np.flatnonzero(self._coefficients[i]):
                c = float(self._coefficients[i, t])
                label = self._terms[t].label(names)
                mag = f"{abs(c):.{precision}g}"
                if label == "1":
                    body = mag
                elif mag == "1":
                    body = label
                else:
                    body = f"{mag} {label}"
                if not parts:
                    parts.append(f"-{body}" if c < 0 else body)
                else:
                    parts.append(f"- {body}" if c < 0 else f"+ {body}")
            rhs = " ".join(parts) if parts else "0"
            if noisy is not None and noisy[i]:
                assert self._noise is not None  # noisy is set only from it
                rhs += f" + noise (variance {float(self._noise[i, i]):.{precision}g} per unit time)"
            lines.append(f"d {name}/dt = {rhs}")
        return lines

    # ------------------------------------------------------------------ variants and spaces
    def with_coefficients(self, coefficients: Any) -> Surrogate:
        """A copy with a new coefficient matrix (same shape), everything else kept."""
        return Surrogate(
            self._variables,
            self._terms,
            coefficients,
            kind=self._kind,
            noise=self._noise,
            transform=self._transform,
            settings=self._settings,
            provenance=self._provenance,
        )

    def with_noise(self, noise: Any) -> Surrogate:
        """A copy with a new noise covariance (or None), everything else kept."""
        return Surrogate(
            self._variables,
            self._terms,
            self._coefficients,
            kind=self._kind,
            noise=noise,
            transform=self._transform,
            settings=self._settings,
            provenance=self._provenance,
        )

    @property
    def observed_variables(self) -> tuple[str, ...]:
        """Model variables that have a data-space counterpart (all of them unless some are hidden).

        Read from ``settings["observed_variables"]`` when present (in that order), as written:
        :meth:`to_data_space` and the validator refuse names that are not model variables.
        """
        observed = self._settings.get("observed_variables")
        return tuple(observed) if observed else self._variables

    @property
    def observed_index(self) -> np.ndarray:
        """Model columns of :attr:`observed_variables`, in that order (every column unless some
        are hidden).

        Raises
        ------
        SettingsError
            When ``settings["observed_variables"]`` names a variable the model lacks.
        """
        index = self._observed_columns()
        return np.arange(self.n_variables) if index is None else index.copy()

    def _observed_columns(self) -> np.ndarray | None:
        """Observed model columns, or None when every variable is observed."""
        if self._transform is not None:
            # fixed at construction: the transform's outputs are the observed variables
            return self._observed_index
        return _observed_columns(self._variables, self._settings)

    def to_model_space(self, X: Any) -> np.ndarray:
        """Map data-space states to model space (identity without a transform).

        With hidden variables beside a transform, the result holds only the observed model
        variables (``settings["observed_variables"]``, in that order): hidden ones have no
        data-space counterpart, so a caller that needs full states must supply them (the
        validator starts them at 0).
        """
        if self._transform is None:
            return np.asarray(X, dtype=np.float64)
        return np.asarray(self._transform.forward(X), dtype=np.float64)

    def to_data_space(self, Z: Any) -> np.ndarray:
        """Map model-space states to data space: the observed columns, through the transform if any.

        ``Z`` (last axis: variables) may hold every model variable, in model order, or only the
        observed ones, in :attr:`observed_variables` order. A model with hidden variables (see
        :attr:`observed_variables`) returns only its observed columns, since hidden ones have no
        data-space counterpart; a model without a transform returns them as they are, one with a
        transform maps them through its inverse. Without hidden variables and without a transform
        this is the identity.
        """
        Z = np.asarray(Z, dtype=np.float64)
        index = self._observed_columns()
        if index is not None and Z.ndim >= 1 and Z.shape[-1] == self.n_variables:
            Z = Z[..., index]
        if self._transform is None:
            return Z
        return np.asarray(self._transform.inverse(Z), dtype=np.float64)

    # ------------------------------------------------------------------ serialisation
    def to_dict(self) -> dict[str, Any]:
        """The ``model.json`` content as plain Python values (see ``data/model.schema.json``)."""
        return {
            "format": FORMAT,
            "kind": self._kind,
            "variables": list(self._variables),
            "terms": [term.to_dict() for term in self._terms],
            "coefficients": self._coefficients.tolist(),
            "noise": None if self._noise is None else self._noise.tolist(),
            "transform": None if self._transform is None else self._transform.to_dict(),
            "settings": self.settings,
            "provenance": self.provenance,
        }

    @classmethod
    def from_dict(cls, d: Any, *, source: str = "model file") -> Surrogate:
        """Build a surrogate from :meth:`to_dict` output, refusing anything malformed.

        Parameters
        ----------
        d : dict
            Parsed ``model.json`` content.
        source : str
            Name of the file, used in messages.

        Raises
        ------
        ModelFileError
            Naming ``source`` and the field: unknown format version, missing or unknown field,
            wrong type, shape mismatch, non-finite number, or (in an ``ergodex-model/2`` file)
            a recorded setting under its old name.

        Notes
        -----
        An ``ergodex-model/1`` file is read with its recorded fit settings renamed to the
        current names. Its fingerprint does not change (see :meth:`fingerprint`), so scorecards
        and registry records made for it still match, also once it is written again as ``/2``.
        """

        def fail(msg: str) -> ModelFileError:
            return ModelFileError(f"{source}: {msg}")

        if not isinstance(d, Mapping):
            raise fail(f"expected a JSON object at the top level, got {type(d).__name__}")
        if "format" not in d:
            raise fail(f"missing field 'format' (expected {FORMAT!r})")
        if d["format"] not in (FORMAT, OLD_FORMAT):
            raise fail(
                f"field 'format' is {d['format']!r}; this ergodex reads {FORMAT!r} and "
                f"{OLD_FORMAT!r} (a newer ergodex may have written it)"
            )
        for key in _TOP_LEVEL_REQUIRED:
            if key not in d:
                raise fail(f"missing field {key!r}")
        unknown = sorted(set(d) - set(_TOP_LEVEL_REQUIRED) - set(_TOP_LEVEL_OPTIONAL))
        if unknown:
            raise fail(
                f"unknown field {unknown[0]!r} (allowed: "
                f"{', '.join(_TOP_LEVEL_REQUIRED + _TOP_LEVEL_OPTIONAL)})"
            )

        kind = d["kind"]
        if not isinstance(kind, str) or not kind:
            raise fail(f"field 'kind' must be a non-empty string, got {kind!r}")
        variables = d["variables"]
        if (
            not isinstance(variables, list)
            or not variables
            or not all(isinstance(v, str) and v for v in variables)
        ):
            raise fail("field 'variables' must be a non-empty list of non-empty strings")
        n = len(variables)

        raw_terms = d["terms"]
        if not isinstance(raw_terms, list) or not raw_terms:
            raise fail("field 'terms' must be a non-empty list")
        terms = []
        for t, entry in enumerate(raw_terms):
            where = f"field 'terms[{t}]'"
            if not isinstance(entry, Mapping) or "kind" not in entry:
                raise fail(f"{where} must be an object with a 'kind'")
            tk = entry["kind"]
            if tk == "monomial":
                if set(entry) != {"kind", "powers"}:
                    raise fail(
                        f"{where}: a monomial has exactly the keys 'kind' and 'powers', got "
                        f"{sorted(entry)}"
                    )
                powers = entry["powers"]
                if not isinstance(powers, list) or not all(
                    isinstance(p, int) and not isinstance(p, bool) and p >= 0 for p in powers
                ):
                    raise fail(
                        f"{where}.powers must be a list of non-negative integers, got "
                        f"{_short(powers)}"
                    )
                if len(powers) != n:
                    raise fail(
                        f"{where}.powers has {len(powers)} entries, expected {n} (one per variable)"
                    )
                if sum(powers) > MAX_DEGREE:
                    raise fail(
                        f"{where}.powers has total degree {sum(powers)}; the largest allowed "
                        f"is {MAX_DEGREE}"
                    )
                terms.append(Term("monomial", tuple(powers)))
            elif tk in ("sin", "cos"):
                if set(entry) != {"kind", "variable", "frequency"}:
                    raise fail(
                        f"{where}: a {tk} term has exactly the keys 'kind', 'variable', "
                        f"'frequency', got {sorted(entry)}"
                    )
                var, freq = entry["variable"], entry["frequency"]
                if not isinstance(var, int) or isinstance(var, bool) or not 0 <= var < n:
                    raise fail(f"{where}.variable must be an integer in 0..{n - 1}, got {var!r}")
                if (
                    not isinstance(freq, (int, float))
                    or isinstance(freq, bool)
                    or (isinstance(freq, float) and not math.isfinite(freq))
                ):
                    raise fail(f"{where}.frequency must be a finite number, got {freq!r}")
                if abs(freq) > MAX_COEFFICIENT:
                    raise fail(
                        f"{where}.frequency {_short(freq)} is beyond the largest allowed "
                        f"magnitude {MAX_COEFFICIENT:g}"
                    )
                terms.append(Term(tk, variable=var, frequency=float(freq)))
            else:
                raise fail(
                    f"{where}.kind {tk!r} is not supported (use one of {', '.join(TERM_KINDS)})"
                )

        coef = _read_matrix(d["coefficients"], (n, len(terms)), "coefficients", fail)
        noise = None
        if d.get("noise") is not None:
            noise = _read_matrix(d["noise"], (n, n), "noise", fail)

        transform = None
        if d.get("transform") is not None:
            if not isinstance(d["transform"], Mapping):
                raise fail("field 'transform' must be an object or null")
            # Imported here: transforms sit beside this module and the model works without one.
            from ergodex.model_space import transform_from_dict

            try:
                transform = transform_from_dict(d["transform"])
            except ModelFileError as exc:
                raise fail(f"field 'transform': {exc}") from None
            except (KeyError, TypeError, ValueError) as exc:
                raise fail(f"field 'transform': {exc}") from None

        for key in ("settings", "provenance"):
            if d.get(key) is not None and not isinstance(d[key], Mapping):
                raise fail(f"field {key!r} must be an object")
        from ergodex.setting_names import old_setting_in, renamed_message, upgrade_settings

        settings = dict(d.get("settings") or {})
        method = settings.get("method")
        if d["format"] == FORMAT and (old := old_setting_in(method, settings)) is not None:
            raise fail(renamed_message("field 'settings'", *old, version=FORMAT))

        if d["format"] == OLD_FORMAT:
            settings = upgrade_settings(method, settings)
        try:
            return cls(
                variables,
                terms,
                coef,
                kind=kind,
                noise=noise,
                transform=transform,
                settings=settings,
                provenance=d.get("provenance") or {},
            )
        except SettingsError as exc:
            raise fail(f"field {exc}") from None

    def to_json(self, path: str | os.PathLike[str] | None = None) -> str:
        """Serialise to JSON text; with ``path``, also write it atomically (temp file + rename).

        Floats are written with Python's shortest round-trip repr, so :meth:`from_json` gives back
        bit-identical coefficients.
        """
        text = _format_json(self.to_dict())
        if path is not None:
            from ergodex.files import atomic_write_text

            atomic_write_text(path, text, make_folder=False)
        return text

    @classmethod
    def from_json(cls, text_or_path: str | os.PathLike[str]) -> Surrogate:
        """Read a surrogate from JSON text or from a file path.

        A ``str`` whose first non-blank character is ``{`` is taken as JSON text; anything else
        is a path.

        Raises
        ------
        ModelFileError
            The file is missing, not JSON, or breaks the model-file rules (the message names the
            file and the field).
        """
        from ergodex.limits import load_json_text, read_text_file

        if isinstance(text_or_path, str) and text_or_path.lstrip().startswith("{"):
            text, source = text_or_path, "model JSON"
        else:
            path = Path(text_or_path)
            source = str(path)
            if not os.path.lexists(path):
                raise ModelFileError(f"{source}: no such model file")
            text = read_text_file(path, "a model file (model.json)", error=ModelFileError)
        data = load_json_text(text, source, error=ModelFileError)
        return cls.from_dict(data, source=source)

    def fingerprint(self) -> str:
        """``"sha256:<hex>"`` of the canonical JSON of everything except ``provenance``.

        Provenance (when and from what it was fitted) is left out so that the same dynamics,
        noise, transform and settings always have the same fingerprint. The JSON is taken in the
        ``ergodex-model/1`` layout (that format string, the settings under their old names), so
        a model's fingerprint did not change when the format became ``/2``: a model file of
        either version, and a scorecard made for it, keep matching.
        """
        from ergodex.setting_names import old_names

        d = self.to_dict()
        d.pop("provenance")
        d["format"] = OLD_FORMAT
        d["settings"] = old_names(d["settings"].get("method"), d["settings"])
        canon = json.dumps(d, sort_keys=True, separators=(",", ":"), allow_nan=False)
        return "sha256:" + hashlib.sha256(canon.encode("utf-8")).hexdigest()


def _observed_columns(
    variables: tuple[str, ...], settings: Mapping[str, Any] | None
) -> np.ndarray | None:
    """Model columns named by ``settings["observed_variables"]``, in its order.

    ``None`` when the setting is absent or empty (every variable is observed). The names must be
    unique model variables.
    """
    observed = (settings or {}).get("observed_variables")
    if observed is None:
        return None
    field = "settings.observed_variables"
    if (
        isinstance(observed, str)
        or not isinstance(observed, Sequence)
        or not all(isinstance(v, str) for v in observed)
    ):
        raise SettingsError(f"{field}: must be a list of variable names, got {observed!r}")
    if not observed:
        return None
    observed = tuple(observed)
    unknown = [v for v in observed if v not in variables]
    if unknown:
        raise SettingsError(
            f"{field}: {unknown[0]!r} is not a model variable (variables: {list(variables)})"
        )
    if len(set(observed)) != len(observed):
        raise SettingsError(f"{field}: names must be unique, got {list(observed)}")
    return np.array([variables.index(v) for v in observed], dtype=np.intp)


def _observed_index(
    transform: Any, variables: tuple[str, ...], settings: Mapping[str, Any] | None
) -> np.ndarray:
    """Model columns a transform with fewer outputs than model variables maps onto.

    Such a model has hidden variables (e.g. the memory level of empirical model reduction);
    ``settings["observed_variables"]`` must then list the transform's outputs, in its order, and
    each must be a model variable.
    """
    outputs = tuple(transform.output_names)
    n = len(variables)
    if (settings or {}).get("observed_variables") is None:
        raise SettingsError(
            f"transform: maps data to {len(outputs)} model variables, but the model has {n} "
            "(a model with hidden variables must list its observed ones in "
            "settings.observed_variables)"
        )
    index = _observed_columns(variables, settings)
    observed = () if index is None else tuple(variables[i] for i in index)
    if observed != outputs:
        raise SettingsError(
            f"settings.observed_variables: {list(observed)} must be the transform's outputs in its "
            f"order, {list(outputs)}"
        )
    assert index is not None  # an empty list gives observed == (), refused just above
    return index


def _format_json(d: Mapping[str, Any]) -> str:
    """Pretty JSON with one term / one matrix row per line (diff-friendly, still plain JSON)."""
    items = []
    for key, value in d.items():
        head = json.dumps(key) + ": "
        if key in ("terms", "coefficients", "noise") and isinstance(value, list) and value:
            rows = ",\n".join("    " + json.dumps(row, allow_nan=False) for row in value)
            items.append(f"  {head}[\n{rows}\n  ]")
        else:
            body = json.dumps(value, indent=2, allow_nan=False).replace("\n", "\n  ")
            items.append(f"  {head}{body}")
    return "{\n" + ",\n".join(items) + "\n}\n"


def _short(x: Any) -> str:
    """repr of a value for a message, cut to 40 characters (a huge integer has 4000 digits)."""
    text = (
        repr(x)
        if not isinstance(x, int) or abs(x) < 10**30
        else f"an integer of {len(str(abs(x)))} digits"
    )
    return text if len(text) <= 40 else text[:37] + "..."


def _read_matrix(value: Any, shape: tuple[int, int], field: str, fail) -> np.ndarray:
    if not isinstance(value, list) or len(value) != shape[0]:
        got = len(value) if isinstance(value, list) else type(value).__name__
        raise fail(f"field {field!r} must be a list of {shape[0]} rows, got {got}")
    for i, row in enumerate(value):
        if not isinstance(row, list) or len(row) != shape[1]:
            got = len(row) if isinstance(row, list) else type(row).__name__
            raise fail(f"field '{field}[{i}]' must have {shape[1]} entries, got {got}")
        for j, x in enumerate(row):
            if (
                not isinstance(x, (int, float))
                or isinstance(x, bool)
                or (isinstance(x, float) and not math.isfinite(x))
            ):
                raise fail(f"field '{field}[{i}][{j}]' must be a finite number, got {_short(x)}")
            if abs(x) > MAX_COEFFICIENT:
                raise fail(
                    f"field '{field}[{i}][{j}]' is {_short(x)}, beyond the largest allowed "
                    f"magnitude {MAX_COEFFICIENT:g}"
                )
    return np.array(value, dtype=np.float64)


# ---------------------------------------------------------------------- pysindy conversion
_VAR_TOKEN = re.compile(r"^x(\d+)(?:\^(\d+))?$")
_TRIG = re.compile(r"^(sin|cos)\(([-+0-9.eE]+) x(\d+)\)$")


def _parse_pysindy_feature(name: str, n: int) -> Term:
    """Turn one pysindy feature name (with default names x0, x1, …) into a Term."""
    name = name.strip()
    if name == "1":
        return Term("monomial", (0,) * n)
    trig = _TRIG.match(name)
    if trig:
        kind, freq, var = trig.group(1), float(trig.group(2)), int(trig.group(3))
        if var >= n:
            raise SettingsError(
                f"pysindy feature {name!r} refers to x{var}, but there are {n} variables"
            )
        return Term(kind, variable=var, frequency=freq)
    powers = [0] * n
    tokens = name.split(" ")
    for tok in tokens:
        match = _VAR_TOKEN.match(tok)
        if not match:
            raise SettingsError(
                f"pysindy feature {name!r} is not a term type ergodex can represent "
                "(supported: monomials such as 'x0 x1^2', and 'sin(k x0)' / 'cos(k x0)')"
            )
        var = int(match.group(1))
        if var >= n:
            raise SettingsError(
                f"pysindy feature {name!r} refers to x{var}, but there are {n} variables"
            )
        powers[var] += int(match.group(2) or 1)
    return Term("monomial", tuple(powers))


def from_pysindy(
    model: Any,
    variables: Sequence[str],
    *,
    kind: str = "polynomial-ode",
    settings: Mapping[str, Any] | None = None,
    provenance: Mapping[str, Any] | None = None,
) -> Surrogate:
    """Convert a fitted pysindy 2.x continuous-time model into a Surrogate.

    The library's feature names are regenerated with the default names ``x0, x1, …`` (so that
    user variable names cannot confuse the parser) and parsed one by one: ``'1'``, products of
    ``'xj'`` / ``'xj^p'``, and ``'sin(k xj)'`` / ``'cos(k xj)'``. Anything else (custom functions,
    products of trigonometric and polynomial terms, control inputs) is refused.

    Parameters
    ----------
    model : pysindy.SINDy
        A fitted model.
    variables : sequence of str
        Names of the state variables, in the order of the columns the model was fitted on.

    Raises
    ------
    SettingsError
        Naming the feature that cannot be represented, or the mismatch in variable count.

    References
    ----------
    .. [1] Brunton, S. L., Proctor, J. L. & Kutz, J. N. (2016). Discovering governing equations
       from data by sparse identification of nonlinear dynamical systems. PNAS 113(15), 3932-3937.
    """
    variables = tuple(variables)
    n = len(variables)
    if "discrete" in type(model).__name__.lower():
        raise SettingsError("from_pysindy: discrete-time models are not supported (need dx/dt)")
    n_in = getattr(model, "n_features_in_", None)
    if n_in is None:
        raise SettingsError("from_pysindy: the pysindy model is not fitted")
    n_control = int(getattr(model, "n_control_features_", 0) or 0)
    if n_control:
        raise SettingsError(
            f"from_pysindy: models with control inputs ({n_control}) are not supported"
        )
    if int(n_in) != n:
        raise SettingsError(
            f"from_pysindy: the model was fitted on {n_in} variables, got {n} names"
        )
    names = model.feature_library.get_feature_names([f"x{j}" for j in range(n)])
    coef = np.asarray(model.coefficients(), dtype=np.float64)
    if coef.shape != (n, len(names)):
        raise SettingsError(
            f"from_pysindy: coefficient shape {coef.shape} does not match {n} variables x "
            f"{len(names)} features"
        )
    terms = [_parse_pysindy_feature(name, n) for name in names]
    # A sum of libraries can list the same function twice (e.g. two constants); merge columns.
    merged: dict[Term, int] = {}
    columns: list[np.ndarray] = []
    unique_terms: list[Term] = []
    for t, term in enumerate(terms):
        if term in merged:
            columns[merged[term]] = columns[merged[term]] + coef[:, t]
        else:
            merged[term] = len(unique_terms)
            unique_terms.append(term)
            columns.append(coef[:, t].copy())
    prov = {"fitted_with": "pysindy", "pysindy_features": list(names)}
    try:
        import pysindy  # noqa: F401  (only to record the version)

        prov["pysindy_version"] = getattr(pysindy, "__version__", "unknown")
    except ImportError:  # pragma: no cover
        pass
    prov.update(dict(provenance or {}))
    return Surrogate(
        variables,
        unique_terms,
        np.column_stack(columns),
        kind=kind,
        settings=settings,
        provenance=prov,
    )
