"""Compiled ensemble kernels (numba), generic over a surrogate's term table.

One kernel serves every surrogate: it runs a small *program* built from the term table
(:func:`build_program`), so no code is generated per model and the compiled machine code is cached
on disk once per machine (``cache=True``).

Layout and program
------------------
Inside a call the live members are the columns of work arrays shaped ``(rows, n_alive)`` ("structure
of arrays"), so every inner loop runs over members and vectorises. A stage buffer holds, row by
row: the ``n`` state variables, one row per *product* term (a monomial of degree three or more, or
a sine/cosine), a row of zeros, a row of ones and a scratch row. A right-hand side is then:

1. product rows, each filled from the state rows in one pass or a few;
2. *passes*, one per equation when it has at most two linear and two quadratic terms: a pass
   computes ``bias + w0 x_l0 + w1 x_l1 + v0 x_a0 x_b0 + v1 x_a1 x_b1`` for every member, where a
   *linear* source is a state or product row and a *quadratic* one a pair of state rows (so the
   common polynomial models of degree two need no product rows at all). A pass that uses fewer
   sources runs a loop body without the unused ones (four shapes: two linear; one linear and one
   quadratic; two and one; two and two), because at a few dozen members every load counts. Longer
   equations are split into partial passes that accumulate in the scratch row (a linear term may
   also fill a free quadratic slot as ``x * 1``).

Only terms with a non-zero coefficient appear, so a sparse model (Lorenz-96 with 40 variables:
861 candidate terms, 160 non-zero coefficients) costs what its non-zero terms cost. The last pass of
each equation also does the Runge-Kutta stage arithmetic and, in the final stage, the blow-up
check, so that the data make as few trips through memory as possible.

Three stage buffers rotate: the state lives in one of them, the stages write the other two, and the
new state goes to the buffer the step no longer needs, so the previous state stays available for a
member that blows up and nothing is copied in the usual case. A member that blows up is swapped out
of the live block, so the loops keep running over contiguous live members only.

Methods and arguments
---------------------
The kernel is one template compiled once per stepper (RK4, Euler-Maruyama, stochastic Heun, and the
plain evaluator :func:`evaluate`) by :func:`bind`, each copy with its method's branches decided at
compile time; a call takes the program, the states and three small named tuples (:class:`Run`,
:class:`Noise`, :class:`Outputs`). :func:`rk4_stepper` is the same RK4 as a separate compiled step
around any compiled right-hand side on the members-inner layout (the scenario generators use it);
the ensemble kernel keeps its stages fused into the passes, because the kernel written as separate
compiled step and right-hand-side functions measured slower on Lorenz-63 (1.5-2 times at 16-64
members, 5 times at one member). Importing this
module imports numba (about half a second); :mod:`ergodex.integrate` imports it only when the
compiled engine is used.
"""

from __future__ import annotations

import math
import types
from collections.abc import Callable
from typing import Any, NamedTuple

import numba as nb
import numpy as np

__all__ = [
    "METHODS",
    "Noise",
    "Outputs",
    "Program",
    "Run",
    "advance",
    "build_program",
    "evaluate",
    "bind",
    "rhs_columns",
    "rk4_stepper",
]


# Pass shapes: which sources a pass's loop body reads (the unused slots hold the zero row).
_TWO_LINEAR = 0  # w0 x_l0 + w1 x_l1
_ONE_ONE = 1  # w0 x_l0 + v0 x_a0 x_b0
_TWO_ONE = 2  # w0 x_l0 + w1 x_l1 + v0 x_a0 x_b0
_TWO_TWO = 3  # all four sources


class Program(NamedTuple):
    """A right-hand side as product rows and accumulation passes (see :func:`build_program`).

    A named tuple of arrays, so that compiled code takes it as one argument.
    """

    prod_kind: np.ndarray
    prod_var: np.ndarray
    prod_freq: np.ndarray
    prod_fptr: np.ndarray
    prod_fvar: np.ndarray
    prod_fpow: np.ndarray
    target: np.ndarray
    shape: np.ndarray
    final: np.ndarray
    lin: np.ndarray
    lin_w: np.ndarray
    qa: np.ndarray
    qb: np.ndarray
    quad_w: np.ndarray
    bias: np.ndarray
    n_rows: int


def build_program(tables: dict, n_variables: int) -> Program:
    """Turn :meth:`Surrogate.term_tables` into product rows and accumulation passes.

    A linear source is a state row or a product row (degree three and up, sine, cosine) with a
    weight; a quadratic source a pair of state rows with a weight. Each pass holds up to two of
    each (a linear source may take a free quadratic slot as ``(row, ones)``); an equation that
    needs more is split into partial passes summed in the scratch row, which the next pass reads
    as one of its linear sources.

    Returns
    -------
    Program
        ``(prod_kind, prod_var, prod_freq, prod_fptr, prod_fvar, prod_fpow, pass_target,
        pass_shape, pass_final, pass_lin (P, 2), pass_lin_w (P, 2), pass_qa (P, 2), pass_qb (P, 2),
        pass_quad_w (P, 2), pass_bias, n_rows)``. Rows ``0..n-1`` of a stage buffer are the
        state, ``n..n+P-1`` the products, then the zero row, the ones row and the scratch row.
    """
    n = int(n_variables)
    kind = np.asarray(tables["kind"])
    fptr, fvar, fpow = tables["factor_ptr"], tables["factor_var"], tables["factor_pow"]
    cptr, ctarget, cvalue = tables["coef_ptr"], tables["coef_target"], tables["coef_value"]

    prod_kind, prod_var, prod_freq = [], [], []
    prod_fptr, prod_fvar, prod_fpow = [0], [], []
    bias = np.zeros(n)
    linear: list[list[tuple[int, float]]] = [[] for _ in range(n)]
    quadratic: list[list[tuple[int, int, float]]] = [[] for _ in range(n)]
    n_products = 0
    source: tuple[str, int] | tuple[str, int, int] | None
    for a in range(len(kind)):
        f0, f1 = int(fptr[a]), int(fptr[a + 1])
        vars_, pows = [int(v) for v in fvar[f0:f1]], [int(p) for p in fpow[f0:f1]]
        if kind[a] == 0 and not vars_:
            source = None  # the constant: a bias
        elif kind[a] == 0 and pows == [1]:
            source = ("lin", vars_[0])
        elif kind[a] == 0 and pows == [2]:
            source = ("quad", vars_[0], vars_[0])
        elif kind[a] == 0 and pows == [1, 1]:
            source = ("quad", vars_[0], vars_[1])
        else:
            source = ("lin", n + n_products)
            n_products += 1
            prod_kind.append(int(kind[a]))
            prod_var.append(int(tables["variable"][a]))
            prod_freq.append(float(tables["frequency"][a]))
            prod_fvar.extend(vars_)
            prod_fpow.extend(pows)
            prod_fptr.append(len(prod_fvar))
        for q in range(int(cptr[a]), int(cptr[a + 1])):
            t, w = int(ctarget[q]), float(cvalue[q])
            if source is None:
                bias[t] += w
            elif source[0] == "lin":
                linear[t].append((source[1], w))
            elif len(source) == 3:
                quadratic[t].append((source[1], source[2], w))

    zero_row = n + n_products
    one_row = zero_row + 1
    scratch = zero_row + 2
    columns: dict[str, list] = {
        k: [] for k in ("target", "shape", "final", "lin", "lin_w", "qa", "qb", "quad_w", "bias")
    }

    def emit(target: int, lin: list, quad: list, b: float, final: int) -> None:
        if not final or len(quad) == 2:
            shape = _TWO_TWO
        elif not quad:
            shape = _TWO_LINEAR
        else:
            shape = _ONE_ONE if len(lin) <= 1 else _TWO_ONE
        lin = lin + [(zero_row, 0.0)] * (2 - len(lin))
        quad = quad + [(zero_row, zero_row, 0.0)] * (2 - len(quad))
        columns["target"].append(target)
        columns["shape"].append(shape)
        columns["final"].append(final)
        columns["lin"].append([r for r, _ in lin])
        columns["lin_w"].append([w for _, w in lin])
        columns["qa"].append([r for r, _, _ in quad])
        columns["qb"].append([r for _, r, _ in quad])
        columns["quad_w"].append([w for _, _, w in quad])
        columns["bias"].append(b)

    for t in range(n):
        lin, quad = list(linear[t]), list(quadratic[t])
        carried = False  # whether the scratch row holds a partial sum for this equation
        while True:
            slots = 1 if carried else 2
            take_lin, lin = lin[:slots], lin[slots:]
            take_quad, quad = quad[:2], quad[2:]
            # Free quadratic slots take further linear terms as (row, ones).
            spare = 2 - len(take_quad)
            take_quad += [(r, one_row, w) for r, w in lin[:spare]]
            lin = lin[spare:]
            if carried:
                take_lin.append((scratch, 1.0))
            if not lin and not quad:
                emit(t, take_lin, take_quad, float(bias[t]), 1)
                break
            emit(scratch, take_lin, take_quad, 0.0, 0)
            carried = True

    def ints(key: str) -> np.ndarray:
        return np.array(columns[key], dtype=np.int64)

    def floats(key: str) -> np.ndarray:
        return np.array(columns[key], dtype=np.float64)

    return Program(
        np.array(prod_kind, dtype=np.int64),
        np.array(prod_var, dtype=np.int64),
        np.array(prod_freq, dtype=np.float64),
        np.array(prod_fptr, dtype=np.int64),
        np.array(prod_fvar, dtype=np.int64),
        np.array(prod_fpow, dtype=np.int64),
        ints("target"),
        ints("shape"),
        ints("final"),
        ints("lin").reshape(-1, 2),
        floats("lin_w").reshape(-1, 2),
        ints("qa").reshape(-1, 2),
        ints("qb").reshape(-1, 2),
        floats("quad_w").reshape(-1, 2),
        floats("bias"),
        int(scratch + 1),
    )


# Fused multiply-add is allowed in the ensemble kernel (about 15 % faster; results change by
# round-off only). The flags that would let the compiler assume no NaN or infinity are not set:
# the blow-up check relies on comparisons with NaN being false.
_FASTMATH = {"contract", "nsz", "arcp"}
_FAST: dict[str, Any] = {"nogil": True, "error_model": "numpy", "fastmath": _FASTMATH}
_EXACT: dict[str, Any] = {"nogil": True, "error_model": "numpy"}


def bind(template: Callable, name: str, *, fastmath: bool = True, **constants: Any) -> Any:
    """Compile ``template`` with some of its global names bound to ``constants``.

    The ensemble kernel and the RK4 step are templates that read their method (``_METHOD``) or
    right-hand side (``_rhs``) as globals: each bound copy is compiled on its own, with the
    method's branches decided at compile time and the right-hand side called directly (and
    inlined by the compiler). A compiled function passed as an argument instead kept numba from
    caching the caller on disk ("uses dynamic globals") and ran several times slower.
    """
    scope = dict(template.__globals__)
    scope.update(constants)
    fn = types.FunctionType(
        template.__code__, scope, name, template.__defaults__, template.__closure__
    )
    fn.__qualname__ = name
    fn.__doc__ = template.__doc__
    return nb.njit(**(_FAST if fastmath else _EXACT))(fn)


# ------------------------------------------------------------------ one RK4 step
def _rhs(params, x, out):  # pragma: no cover - replaced by bind
    """Placeholder of the right-hand side the RK4 template calls (see :func:`rk4_stepper`)."""
    raise NotImplementedError


def _rk4(params, x, h, work):  # pragma: no cover - compiled
    """One classical RK4 step (Kutta 1901) of ``x`` in place: ``x + h/6 (k1 + 2 k2 + 2 k3 + k4)``.

    ``x`` (n, M) holds one state per column; ``work = (y, k)`` with ``y`` like ``x`` and ``k``
    (4, n, M); ``_rhs(params, x, out)`` writes the right-hand side of every column into ``out``.
    """
    y, k = work
    n, M = x.shape
    half = 0.5 * h
    _rhs(params, x, k[0])
    for i in range(n):
        for c in range(M):
            y[i, c] = x[i, c] + half * k[0, i, c]
    _rhs(params, y, k[1])
    for i in range(n):
        for c in range(M):
            y[i, c] = x[i, c] + half * k[1, i, c]
    _rhs(params, y, k[2])
    for i in range(n):
        for c in range(M):
            y[i, c] = x[i, c] + h * k[2, i, c]
    _rhs(params, y, k[3])
    sixth = h / 6.0
    for i in range(n):
        for c in range(M):
            x[i, c] = x[i, c] + sixth * (
                k[0, i, c] + 2.0 * k[1, i, c] + 2.0 * k[2, i, c] + k[3, i, c]
            )


def rk4_stepper(rhs: Any, *, fastmath: bool = False) -> Any:
    """The compiled RK4 step ``step(params, x, h, (y, k))`` of a compiled ``rhs(params, x, out)``.

    Members are columns (``x`` is (n, M)), so the loops run over members. Without ``fastmath``
    the arithmetic is exactly numpy's ``x + h/6 * (k1 + 2 k2 + 2 k3 + k4)`` (no fused
    multiply-add), which keeps the scenario generators' data identical to
    :func:`ergodex.rk4.rk4_step` on the same right-hand side.
    """
    return bind(_rk4, f"rk4_step_{rhs.__name__}", fastmath=fastmath, _rhs=rhs)


# ------------------------------------------------------------------ the ensemble kernel
class Run(NamedTuple):
    """Settings of one :func:`advance` call."""

    t0: float  # time at the start of the call
    h: float  # substep
    n_outputs: int  # blocks of `k` substeps, one output after each
    k: int
    lower: np.ndarray  # (n,) finite bounds: a state is accepted when lower <= x <= upper
    upper: np.ndarray


class Noise(NamedTuple):
    """Standard normal draws ``(n_outputs * k, M, n)`` by member (empty for RK4) and ``L``."""

    draws: np.ndarray
    chol: np.ndarray  # (n, n), L L^T = noise covariance per unit time


class Outputs(NamedTuple):
    """Where the kept variables go: ``out[:, j0 + j]`` after block ``j`` when ``write``."""

    out: np.ndarray  # (M, n_out, n_keep); dead members' slots are left as they are (NaN)
    j0: int
    write: bool
    keep: np.ndarray  # (n_keep,) indices of the kept variables


@nb.njit(cache=True, nogil=True)
def _flush(out, held, n_held, idx, na, first):
    """Copy ``n_held`` held outputs of the live members to ``out[:, first:first + n_held]``.

    Outputs are held member-inner (``held[b, q, c]``) and copied in blocks, so that each member's
    stretch of ``out`` is written in one go: writing every output straight into ``out`` touches
    one cache line per member each time, which cost about a quarter of a Lorenz-63 run.
    """
    for c in range(na):
        m = idx[c]
        for b in range(n_held):
            for q in range(held.shape[1]):
                out[m, first + b, q] = held[b, q, c]


def _kernel(program, state, alive, blowup_time, run, noise_, outputs):  # pragma: no cover
    """Advance every live member by ``run.n_outputs * run.k`` substeps of the bound method.

    A template (see :func:`bind`): ``_METHOD`` is 0 classical RK4, 1 Euler-Maruyama, 2 stochastic
    Heun, or 3 (the evaluator) replace each state by the right-hand side at that state; the
    arguments are described at :func:`advance`.

    Everything runs inside this one function, with no calls in the step loop: passing arrays to
    a helper makes numba count references to each of them on every call, which costs more than
    the arithmetic for small systems (measured: a Lorenz-63 step with the right-hand side and the
    RK4 stages as separate compiled functions took about twice as long at 16 members). RK4 keeps
    ``k1 + 2 k2 + 2 k3`` in ``Acc``; its first stage writes ``Acc = k1`` and the next two stages
    add ``2 k``; the last pass of each equation does the stage arithmetic.
    """
    prod_kind, prod_var, prod_freq, prod_fptr, prod_fvar, prod_fpow = program[:6]
    p_target, p_shape, p_final, p_lin, p_lin_w, p_qa, p_qb, p_quad_w, p_bias = program[6:15]
    n_rows = program.n_rows
    t0, h, n_outputs, k, lower, upper = run
    noise, chol = noise_
    out, j0, write, keep = outputs
    M, n = state.shape
    idx = np.empty(M, dtype=np.int64)
    na = 0
    for m in range(M):
        if alive[m]:
            idx[na] = m
            na += 1
    SS = np.zeros((3, n_rows, M))
    one_row = n_rows - 2
    for b in range(3):
        for c in range(M):
            SS[b, one_row, c] = 1.0
    KK = np.zeros((2, n, M))
    Acc = np.zeros((n, M))
    dW = np.zeros((n, M))
    # Outputs are held here (about 256 kB at most) and copied to `out` in blocks (see _flush).
    n_keep = keep.shape[0]
    held = np.empty((max(1, min(64, 32768 // max(1, n_keep * M))) if write else 1, n_keep, M))
    n_held = 0
    # Buffer roles: `cur` holds the state; `ba` and `bb` take the stages; the new state goes to
    # `bb`, which then becomes `cur` while the old state's buffer becomes `bb`.
    cur = 0
    ba = 1
    bb = 2
    for c in range(na):
        for i in range(n):
            SS[cur, i, c] = state[idx[c], i]
    sqh = math.sqrt(h)
    half = 0.5 * h
    n_prod = prod_kind.shape[0]
    n_pass = p_target.shape[0]
    if _METHOD == 0:
        n_stages = 4
    elif _METHOD == 2:
        n_stages = 2
    else:
        n_stages = 1
    for j in range(n_outputs):
        for s in range(k):
            if na == 0:
                break
            step = j * k + s
            if _METHOD == 1 or _METHOD == 2:
                # Noise increment dW = sqrt(h) L xi, xi ~ N(0, I): covariance h * (L L^T).
                for c in range(na):
                    m = idx[c]
                    for i in range(n):
                        acc = 0.0
                        for col in range(n):
                            acc += chol[i, col] * noise[step, m, col]
                        dW[i, c] = sqh * acc
            nbad = 0
            for stage in range(n_stages):
                # RK4 stage inputs: the state, then ba, bb, ba; outputs ba, bb, ba, bb. The
                # stochastic schemes read the state and (Heun's corrector) the predictor in ba.
                if stage == 0:
                    src = cur
                    dst = ba
                elif stage == 2:
                    src = bb
                    dst = ba
                else:
                    src = ba
                    dst = bb
                # RK4: the next stage input is x + a1 k (stages 1-3); the new state
                # x + h/6 (Acc + k4).
                if stage == 0 or stage == 1:
                    a1 = half
                elif stage == 2:
                    a1 = h
                else:
                    a1 = h / 6.0
                # 1. Product rows (terms beyond quadratic, sines, cosines) from the state rows.
                for r in range(n_prod):
                    row = n + r
                    kd = prod_kind[r]
                    if kd == 0:
                        f0 = prod_fptr[r]
                        f1 = prod_fptr[r + 1]
                        jv = prod_fvar[f0]
                        p = prod_fpow[f0]
                        if p == 1:
                            for c in range(na):
                                SS[src, row, c] = SS[src, jv, c]
                        elif p == 2:
                            for c in range(na):
                                SS[src, row, c] = SS[src, jv, c] * SS[src, jv, c]
                        else:
                            for c in range(na):
                                SS[src, row, c] = SS[src, jv, c] ** p
                        for f in range(f0 + 1, f1):
                            jv = prod_fvar[f]
                            p = prod_fpow[f]
                            if p == 1:
                                for c in range(na):
                                    SS[src, row, c] *= SS[src, jv, c]
                            elif p == 2:
                                for c in range(na):
                                    SS[src, row, c] *= SS[src, jv, c] * SS[src, jv, c]
                            else:
                                for c in range(na):
                                    SS[src, row, c] *= SS[src, jv, c] ** p
                    elif kd == 1:
                        jv = prod_var[r]
                        w = prod_freq[r]
                        for c in range(na):
                            SS[src, row, c] = math.sin(w * SS[src, jv, c])
                    else:
                        jv = prod_var[r]
                        w = prod_freq[r]
                        for c in range(na):
                            SS[src, row, c] = math.cos(w * SS[src, jv, c])
                # 2. Passes; the last pass of each equation applies the stage.
                for q in range(n_pass):
                    t = p_target[q]
                    sh = p_shape[q]
                    l0 = p_lin[q, 0]
                    l1 = p_lin[q, 1]
                    w0 = p_lin_w[q, 0]
                    w1 = p_lin_w[q, 1]
                    a0 = p_qa[q, 0]
                    b0 = p_qb[q, 0]
                    v0 = p_quad_w[q, 0]
                    a_1 = p_qa[q, 1]
                    b_1 = p_qb[q, 1]
                    v1 = p_quad_w[q, 1]
                    b = p_bias[q]
                    if p_final[q] == 0 or _METHOD != 0:
                        # A partial sum (into the scratch row) or a plain right-hand side.
                        if p_final[q] == 0:
                            for c in range(na):
                                SS[src, t, c] = (
                                    b
                                    + w0 * SS[src, l0, c]
                                    + w1 * SS[src, l1, c]
                                    + v0 * SS[src, a0, c] * SS[src, b0, c]
                                    + v1 * SS[src, a_1, c] * SS[src, b_1, c]
                                )
                        else:
                            for c in range(na):
                                KK[stage, t, c] = (
                                    b
                                    + w0 * SS[src, l0, c]
                                    + w1 * SS[src, l1, c]
                                    + v0 * SS[src, a0, c] * SS[src, b0, c]
                                    + v1 * SS[src, a_1, c] * SS[src, b_1, c]
                                )
                    elif stage == 0:
                        # RK4 stage 1: Acc = k1.
                        if sh == _TWO_LINEAR:
                            for c in range(na):
                                kv = b + w0 * SS[src, l0, c] + w1 * SS[src, l1, c]
                                Acc[t, c] = kv
                                SS[dst, t, c] = SS[cur, t, c] + a1 * kv
                        elif sh == _ONE_ONE:
                            for c in range(na):
                                kv = b + w0 * SS[src, l0, c] + v0 * SS[src, a0, c] * SS[src, b0, c]
                                Acc[t, c] = kv
                                SS[dst, t, c] = SS[cur, t, c] + a1 * kv
                        elif sh == _TWO_ONE:
                            for c in range(na):
                                kv = (
                                    b
                                    + w0 * SS[src, l0, c]
                                    + w1 * SS[src, l1, c]
                                    + v0 * SS[src, a0, c] * SS[src, b0, c]
                                )
                                Acc[t, c] = kv
                                SS[dst, t, c] = SS[cur, t, c] + a1 * kv
                        else:
                            for c in range(na):
                                kv = (
                                    b
                                    + w0 * SS[src, l0, c]
                                    + w1 * SS[src, l1, c]
                                    + v0 * SS[src, a0, c] * SS[src, b0, c]
                                    + v1 * SS[src, a_1, c] * SS[src, b_1, c]
                                )
                                Acc[t, c] = kv
                                SS[dst, t, c] = SS[cur, t, c] + a1 * kv
                    elif stage < 3:
                        # RK4 stages 2-3.
                        if sh == _TWO_LINEAR:
                            for c in range(na):
                                kv = b + w0 * SS[src, l0, c] + w1 * SS[src, l1, c]
                                Acc[t, c] += 2.0 * kv
                                SS[dst, t, c] = SS[cur, t, c] + a1 * kv
                        elif sh == _ONE_ONE:
                            for c in range(na):
                                kv = b + w0 * SS[src, l0, c] + v0 * SS[src, a0, c] * SS[src, b0, c]
                                Acc[t, c] += 2.0 * kv
                                SS[dst, t, c] = SS[cur, t, c] + a1 * kv
                        elif sh == _TWO_ONE:
                            for c in range(na):
                                kv = (
                                    b
                                    + w0 * SS[src, l0, c]
                                    + w1 * SS[src, l1, c]
                                    + v0 * SS[src, a0, c] * SS[src, b0, c]
                                )
                                Acc[t, c] += 2.0 * kv
                                SS[dst, t, c] = SS[cur, t, c] + a1 * kv
                        else:
                            for c in range(na):
                                kv = (
                                    b
                                    + w0 * SS[src, l0, c]
                                    + w1 * SS[src, l1, c]
                                    + v0 * SS[src, a0, c] * SS[src, b0, c]
                                    + v1 * SS[src, a_1, c] * SS[src, b_1, c]
                                )
                                Acc[t, c] += 2.0 * kv
                                SS[dst, t, c] = SS[cur, t, c] + a1 * kv
                    else:
                        # RK4 stage 4: the new state x + h/6 (Acc + k4), checked against the bound;
                        # NaN and +-inf fail one of the two comparisons.
                        lo = lower[t]
                        hi = upper[t]
                        if sh == _TWO_LINEAR:
                            for c in range(na):
                                kv = b + w0 * SS[src, l0, c] + w1 * SS[src, l1, c]
                                v = SS[cur, t, c] + a1 * (Acc[t, c] + kv)
                                SS[dst, t, c] = v
                                nbad += not ((v >= lo) & (v <= hi))
                        elif sh == _ONE_ONE:
                            for c in range(na):
                                kv = b + w0 * SS[src, l0, c] + v0 * SS[src, a0, c] * SS[src, b0, c]
                                v = SS[cur, t, c] + a1 * (Acc[t, c] + kv)
                                SS[dst, t, c] = v
                                nbad += not ((v >= lo) & (v <= hi))
                        elif sh == _TWO_ONE:
                            for c in range(na):
                                kv = (
                                    b
                                    + w0 * SS[src, l0, c]
                                    + w1 * SS[src, l1, c]
                                    + v0 * SS[src, a0, c] * SS[src, b0, c]
                                )
                                v = SS[cur, t, c] + a1 * (Acc[t, c] + kv)
                                SS[dst, t, c] = v
                                nbad += not ((v >= lo) & (v <= hi))
                        else:
                            for c in range(na):
                                kv = (
                                    b
                                    + w0 * SS[src, l0, c]
                                    + w1 * SS[src, l1, c]
                                    + v0 * SS[src, a0, c] * SS[src, b0, c]
                                    + v1 * SS[src, a_1, c] * SS[src, b_1, c]
                                )
                                v = SS[cur, t, c] + a1 * (Acc[t, c] + kv)
                                SS[dst, t, c] = v
                                nbad += not ((v >= lo) & (v <= hi))
                # 3. Between the stages of stochastic Heun: the predictor, into ba.
                if _METHOD == 2 and stage == 0:
                    for i in range(n):
                        for c in range(na):
                            SS[ba, i, c] = SS[cur, i, c] + h * KK[0, i, c] + dW[i, c]
            if _METHOD == _RHS_ONLY:
                for c in range(na):
                    for i in range(n):
                        state[idx[c], i] = KK[0, i, c]
                return na
            if _METHOD == 1 or _METHOD == 2:
                for i in range(n):
                    lo = lower[i]
                    hi = upper[i]
                    for c in range(na):
                        x = SS[cur, i, c]
                        if _METHOD == 2:
                            v = x + half * (KK[0, i, c] + KK[1, i, c]) + dW[i, c]
                        else:
                            v = x + h * KK[0, i, c] + dW[i, c]
                        SS[bb, i, c] = v
                        nbad += not ((v >= lo) & (v <= hi))
            if nbad > 0:
                # Outputs held so far belong to the members in their current columns.
                _flush(out, held, n_held, idx, na, j0 + j - n_held)
                n_held = 0
                # Stop the members that failed (their last accepted state is still in `cur`) and
                # swap the last live member into their column.
                c = 0
                while c < na:
                    ok = True
                    for i in range(n):
                        v = SS[bb, i, c]
                        if not (v >= lower[i] and v <= upper[i]):
                            ok = False
                            break
                    if ok:
                        c += 1
                    else:
                        m = idx[c]
                        alive[m] = False
                        blowup_time[m] = t0 + (step + 1) * h
                        for i in range(n):
                            state[m, i] = SS[cur, i, c]
                        na -= 1
                        idx[c] = idx[na]
                        for i in range(n):
                            SS[bb, i, c] = SS[bb, i, na]
                            SS[cur, i, c] = SS[cur, i, na]
            old = cur
            cur = bb
            bb = old
        if write:
            for q in range(n_keep):
                kq = keep[q]
                for c in range(na):
                    held[n_held, q, c] = SS[cur, kq, c]
            n_held += 1
            if n_held == held.shape[0]:
                _flush(out, held, n_held, idx, na, j0 + j + 1 - n_held)
                n_held = 0
    _flush(out, held, n_held, idx, na, j0 + n_outputs - n_held)
    for c in range(na):
        for i in range(n):
            state[idx[c], i] = SS[cur, i, c]
    return na


_RHS_ONLY = 3
_METHOD = 0  # placeholder (see bind)
#: The kernel compiled once per stepper (and once as the plain evaluator).
_CODES = {"rk4": 0, "euler-maruyama": 1, "heun": 2, "rhs": _RHS_ONLY}
_LOOPS = {
    name: bind(_kernel, "kernel_" + name.replace("-", "_"), _METHOD=code)
    for name, code in _CODES.items()
}
_rk4_loop = _LOOPS["rk4"]
_euler_maruyama_loop = _LOOPS["euler-maruyama"]
_heun_loop = _LOOPS["heun"]
_rhs_loop = _LOOPS["rhs"]


# One entry point per method, which numba caches on disk with its bound kernel inside.
@nb.njit(cache=True, **_FAST)
def _advance_rk4(program, state, alive, blowup_time, run, noise, outputs):  # pragma: no cover
    return _rk4_loop(program, state, alive, blowup_time, run, noise, outputs)


@nb.njit(cache=True, **_FAST)
def _advance_euler_maruyama(
    program, state, alive, blowup_time, run, noise, outputs
):  # pragma: no cover
    return _euler_maruyama_loop(program, state, alive, blowup_time, run, noise, outputs)


@nb.njit(cache=True, **_FAST)
def _advance_heun(program, state, alive, blowup_time, run, noise, outputs):  # pragma: no cover
    return _heun_loop(program, state, alive, blowup_time, run, noise, outputs)


@nb.njit(cache=True, **_FAST)
def _evaluate(program, states, alive, blowup_time, run, noise, outputs):  # pragma: no cover
    return _rhs_loop(program, states, alive, blowup_time, run, noise, outputs)


_ADVANCE = {"rk4": _advance_rk4, "euler-maruyama": _advance_euler_maruyama, "heun": _advance_heun}
#: Stepper names understood by :func:`advance`.
METHODS = tuple(_ADVANCE)


def advance(
    method: str,
    program: Program,
    state: np.ndarray,
    alive: np.ndarray,
    blowup_time: np.ndarray,
    run: Run,
    noise: Noise,
    outputs: Outputs,
) -> int:
    """Advance every live member by ``run.n_outputs * run.k`` substeps of ``method``.

    Parameters
    ----------
    method : {"rk4", "euler-maruyama", "heun"}
        The stepper (see :mod:`ergodex.integrate`); the stochastic ones add ``sqrt(h) L xi``
        with ``xi`` from ``noise.draws`` indexed by member (so the draws do not depend on which
        members are alive).
    program : Program
        From :func:`build_program`.
    state : ndarray (M, n)
        Current states, updated in place; a member that blows up keeps its last accepted state.
    alive : ndarray (M,) bool
        Updated in place.
    blowup_time : ndarray (M,)
        Set (to ``run.t0 + steps * h``) for members that blow up during this call.
    run, noise, outputs : Run, Noise, Outputs
        Step settings and bounds, the noise draws and factor, where the outputs go.

    Returns
    -------
    int
        Number of live members after the call.
    """
    return int(_ADVANCE[method](program, state, alive, blowup_time, run, noise, outputs))


def evaluate(program: Program, states: Any) -> np.ndarray:
    """Right-hand side at many states ``(M, n) -> (M, n)``, by the compiled ``program``.

    The one evaluator of a surrogate's terms: :meth:`Surrogate.rhs`, :mod:`ergodex.lyapunov` and
    the ensemble kernel all run the same :class:`Program` through the same compiled passes.
    """
    x = np.array(states, dtype=np.float64, order="C", ndmin=2)
    M, n = x.shape
    bound = np.full(n, np.finfo(np.float64).max)
    _evaluate(
        program,
        x,
        np.ones(M, dtype=np.bool_),
        np.full(M, np.nan),
        Run(0.0, 1.0, 1, 1, -bound, bound),
        Noise(np.zeros((0, M, n)), np.zeros((n, n))),
        Outputs(np.empty((M, 1, n)), 0, False, np.arange(n, dtype=np.int64)),
    )
    return x


def rhs_columns(states: Any, *program: Any) -> np.ndarray:
    """:func:`evaluate` with the program's arrays given one by one."""
    return evaluate(Program(*program), states)
