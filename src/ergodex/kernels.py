"""Compiled ensemble kernels (numba), generic over a surrogate's term table.

One kernel serves every surrogate: it runs a small *program* built from the term table
(:func:`build_program`), so no code is generated per model and the compiled machine code is cached
on disk once per machine (``cache=True``).

Layout and program
------------------
Inside a call the live members are the columns of work arrays shaped ``(rows, n_alive)`` ("structure
of arrays"), so every inner loop runs over members and vectorises. A stage buffer holds, row by
row: the ``n`` state variables of the stage input, one row per *product* term (a monomial of degree
three or more, or a sine/cosine), a row of zeros, a row of ones and a scratch row. A right-hand
side is then:

1. product rows, each filled from the state rows in one pass or a few;
2. *passes*, each of which adds up to four sources ``weight * row * row2`` plus a constant: a linear
   term is ``(x_j, ones)``, a quadratic one ``(x_j, x_l)`` (so the common polynomial models of
   degree two need no product rows at all), a product row ``(row, ones)``, and the zero row pads
   a pass with fewer sources. An equation with more than four non-zero terms is split into
   partial passes that accumulate in the scratch row.

Only terms with a non-zero coefficient appear, so a sparse model (Lorenz-96 with 40 variables:
861 candidate terms, 160 non-zero coefficients) costs what its non-zero terms cost. The last pass of
each equation also does the Runge-Kutta stage arithmetic and, in the final stage, the blow-up
check, so that the data make as few trips through memory as possible.

A member that blows up is swapped out of the live block, so the loops keep running over contiguous
live members only. Importing this module imports numba (about half a second);
:mod:`ergodex.integrate` imports it only when the compiled engine is used.
"""

from __future__ import annotations

import math

import numba as nb
import numpy as np

__all__ = ["METHOD_CODES", "Program", "build_program", "advance", "rhs_columns"]

#: Stepper codes understood by :func:`advance`.
METHOD_CODES = {"rk4": 0, "euler-maruyama": 1, "heun": 2}

# Pass modes: what the last pass of an equation does with its value k.
_PLAIN = 0  # out = k
_STAGE1 = 1  # acc = k;        out = x + a k
_STAGE23 = 2  # acc += 2 k;    out = x + a k
_STAGE4 = 3  # out = x + a (acc + k), and count states outside [lower, upper]


class Program(tuple):
    """The arrays :func:`advance` runs, in order (a plain tuple so numba can take it apart)."""


def build_program(tables: dict, n_variables: int) -> Program:
    """Turn :meth:`Surrogate.term_tables` into product rows and accumulation passes.

    Each pass adds up to four sources ``w * S[r] * S[r2]`` and a constant: a linear term is
    ``(x_j, ones)``, a quadratic one ``(x_j, x_l)``, anything else (degree three and up, sine,
    cosine) gets a product row of its own, used as ``(row, ones)``.

    Returns
    -------
    Program
        ``(prod_kind, prod_var, prod_freq, prod_fptr, prod_fvar, prod_fpow, pass_target,
        pass_rows, pass_rows2, pass_weights, pass_bias, pass_final, pass_width, n_rows)``.
        Rows ``0..n-1`` of a stage buffer are the state, ``n..n+P-1`` the products, then the zero
        row, the ones row and the scratch row.
    """
    n = int(n_variables)
    kind = np.asarray(tables["kind"])
    fptr, fvar, fpow = tables["factor_ptr"], tables["factor_var"], tables["factor_pow"]
    cptr, ctarget, cvalue = tables["coef_ptr"], tables["coef_target"], tables["coef_value"]

    prod_kind, prod_var, prod_freq = [], [], []
    prod_fptr, prod_fvar, prod_fpow = [0], [], []
    bias = np.zeros(n)
    sources: list[list[tuple[int, int, float]]] = [[] for _ in range(n)]
    n_products = 0
    pending = []
    for a in range(len(kind)):
        f0, f1 = int(fptr[a]), int(fptr[a + 1])
        vars_, pows = [int(v) for v in fvar[f0:f1]], [int(p) for p in fpow[f0:f1]]
        if kind[a] == 0 and not vars_:
            pair = None  # the constant: a bias, not a source
        elif kind[a] == 0 and pows == [1]:
            pair = (vars_[0], "one")
        elif kind[a] == 0 and pows == [2]:
            pair = (vars_[0], vars_[0])
        elif kind[a] == 0 and pows == [1, 1]:
            pair = (vars_[0], vars_[1])
        else:
            pair = (n + n_products, "one")
            n_products += 1
            prod_kind.append(int(kind[a]))
            prod_var.append(int(tables["variable"][a]))
            prod_freq.append(float(tables["frequency"][a]))
            prod_fvar.extend(vars_)
            prod_fpow.extend(pows)
            prod_fptr.append(len(prod_fvar))
        pending.append((a, pair))

    zero_row = n + n_products
    one_row = zero_row + 1
    scratch = zero_row + 2
    for a, pair in pending:
        for q in range(int(cptr[a]), int(cptr[a + 1])):
            t, w = int(ctarget[q]), float(cvalue[q])
            if pair is None:
                bias[t] += w
            else:
                r2 = one_row if pair[1] == "one" else pair[1]
                sources[t].append((pair[0], r2, w))

    pad = (zero_row, zero_row, 0.0)
    p_target, p_rows, p_rows2, p_weights, p_bias, p_final, p_width = [], [], [], [], [], [], []

    def emit(target, group, b, final):
        width = 2 if len(group) <= 2 else 4
        group = group + [pad] * (4 - len(group))
        p_target.append(target)
        p_rows.append([r for r, _, _ in group])
        p_rows2.append([r for _, r, _ in group])
        p_weights.append([w for _, _, w in group])
        p_bias.append(b)
        p_final.append(final)
        p_width.append(width)

    for t in range(n):
        src = list(sources[t])
        first = True
        # Partial passes: four sources (three after the first, plus the scratch row).
        while len(src) > (4 if first else 3):
            take = 4 if first else 3
            group, src = src[:take], src[take:]
            if not first:
                group = group + [(scratch, one_row, 1.0)]
            emit(scratch, group, 0.0, 0)
            first = False
        if not first:
            src = src + [(scratch, one_row, 1.0)]
        emit(t, src, float(bias[t]), 1)

    return Program(
        (
            np.array(prod_kind, dtype=np.int64),
            np.array(prod_var, dtype=np.int64),
            np.array(prod_freq, dtype=np.float64),
            np.array(prod_fptr, dtype=np.int64),
            np.array(prod_fvar, dtype=np.int64),
            np.array(prod_fpow, dtype=np.int64),
            np.array(p_target, dtype=np.int64),
            np.array(p_rows, dtype=np.int64).reshape(-1, 4),
            np.array(p_rows2, dtype=np.int64).reshape(-1, 4),
            np.array(p_weights, dtype=np.float64).reshape(-1, 4),
            np.array(p_bias, dtype=np.float64),
            np.array(p_final, dtype=np.int64),
            np.array(p_width, dtype=np.int64),
            np.int64(scratch + 1),
        )
    )


def rhs_columns(states, *program):
    """Compiled ``rhs`` of many states (M, n) -> (M, n) through :func:`advance` itself.

    Used by the tests to compare the compiled term evaluation with the numpy one.
    """
    states = np.array(states, dtype=np.float64, order="C")
    M, n = states.shape
    alive = np.ones(M, dtype=np.bool_)
    blowup = np.full(M, np.nan)
    out = np.empty((M, 1, n))
    bound = np.full(n, np.finfo(np.float64).max)
    advance(_RHS_ONLY, states, alive, blowup, 0.0, 1.0, 1, 1, np.zeros((0, M, n)), np.zeros((n, n)), out, 0,
            False, np.arange(n, dtype=np.int64), -bound, bound, *program)
    return states


_RHS_ONLY = 3


# Fused multiply-add is allowed (about 15 % faster here; results change by round-off only). The
# flags that would let the compiler assume no NaN or infinity are not set: the blow-up check
# relies on comparisons with NaN being false.
_FASTMATH = {"contract", "nsz", "arcp"}


@nb.njit(cache=True, nogil=True, error_model="numpy", fastmath=_FASTMATH)
def advance(method, state, alive, blowup_time, t0, h, n_outputs, k, noise, chol, out, j0, write,
            keep, lower, upper, prod_kind, prod_var, prod_freq, prod_fptr, prod_fvar, prod_fpow,
            p_target, p_rows, p_rows2, p_w, p_bias, p_final, p_width, n_rows):
    """Advance every live member by ``n_outputs * k`` substeps of length ``h``.

    Parameters (arrays C-contiguous float64 / int64 unless noted)
    ----------
    method : int
        0 classical RK4, 1 Euler-Maruyama, 2 stochastic Heun (see :mod:`ergodex.integrate`);
        3 (testing) replace each state by the right-hand side at that state.
    state : (M, n)
        Current states, updated in place; a member that blows up keeps its last accepted state.
    alive : (M,) bool
        Updated in place.
    blowup_time : (M,)
        Set (to ``t0 + steps * h``) for members that blow up during this call.
    noise : (n_outputs * k, M, n)
        Standard normal draws, indexed by member (so the draws do not depend on which members
        are alive); unused (may be empty) for ``method == 0``.
    chol : (n, n)
        Factor ``L`` with ``L L^T`` = noise covariance per unit time.
    out : (M, n_out, n_keep)
        Outputs; after substep block ``j`` the kept variables of live members go to
        ``out[:, j0 + j]`` when ``write``; dead members' slots are left as they are (NaN).
    keep : (n_keep,)
        Indices of the variables written to ``out``.
    lower, upper : (n,)
        Finite bounds: a state is accepted when ``lower <= x <= upper`` for every variable
        (which also rejects NaN and infinities).
    prod_kind … n_rows
        The :func:`build_program` arrays.

    Returns
    -------
    int
        Number of live members after the call.

    Notes
    -----
    Everything runs inside this one function, with no calls in the step loop: passing arrays to
    a helper makes numba count references to each of them on every call, which costs more than
    the arithmetic for small systems. Three stage buffers are used in turn; buffer 2 holds the
    current state, which the last stage overwrites in place after saving it in buffer 0, so that
    no copy is needed when every member passes the check (the usual case).
    """
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
    for c in range(na):
        for i in range(n):
            SS[2, i, c] = state[idx[c], i]
    sqh = math.sqrt(h)
    half = 0.5 * h
    n_prod = prod_kind.shape[0]
    n_pass = p_target.shape[0]
    if method == 0:
        n_stages = 4
    elif method == 2:
        n_stages = 2
    else:
        n_stages = 1
    for j in range(n_outputs):
        for s in range(k):
            if na == 0:
                break
            step = j * k + s
            if method == 1 or method == 2:
                # Noise increment dW = sqrt(h) L xi, xi ~ N(0, I): covariance h * (L L^T).
                for c in range(na):
                    m = idx[c]
                    for i in range(n):
                        acc = 0.0
                        for l in range(n):
                            acc += chol[i, l] * noise[step, m, l]
                        dW[i, c] = sqh * acc
            nbad = 0
            for stage in range(n_stages):
                # Stage input buffer: RK4 reads 2 (the state), 1, 0, 1; the others 2, then 1.
                if stage == 0:
                    src = 2
                elif stage == 2:
                    src = 0
                else:
                    src = 1
                if method == 0:
                    if stage == 0:
                        mode = _STAGE1
                        a = half
                        dst = 1
                    elif stage == 1:
                        mode = _STAGE23
                        a = half
                        dst = 0
                    elif stage == 2:
                        mode = _STAGE23
                        a = h
                        dst = 1
                    else:
                        mode = _STAGE4
                        a = h / 6.0
                        dst = 2
                else:
                    mode = _PLAIN
                    a = 0.0
                    dst = 0
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
                # 2. Accumulation passes; the last pass of each equation applies the stage.
                for q in range(n_pass):
                    t = p_target[q]
                    r0 = p_rows[q, 0]
                    r1 = p_rows[q, 1]
                    r2 = p_rows[q, 2]
                    r3 = p_rows[q, 3]
                    u0 = p_rows2[q, 0]
                    u1 = p_rows2[q, 1]
                    u2 = p_rows2[q, 2]
                    u3 = p_rows2[q, 3]
                    w0 = p_w[q, 0]
                    w1 = p_w[q, 1]
                    w2 = p_w[q, 2]
                    w3 = p_w[q, 3]
                    b = p_bias[q]
                    if p_final[q] == 0:
                        for c in range(na):
                            SS[src, t, c] = (b + w0 * SS[src, r0, c] * SS[src, u0, c]
                                             + w1 * SS[src, r1, c] * SS[src, u1, c]
                                             + w2 * SS[src, r2, c] * SS[src, u2, c]
                                             + w3 * SS[src, r3, c] * SS[src, u3, c])
                    elif p_width[q] == 2:
                        if mode == _PLAIN:
                            for c in range(na):
                                KK[stage, t, c] = (b + w0 * SS[src, r0, c] * SS[src, u0, c]
                                                   + w1 * SS[src, r1, c] * SS[src, u1, c])
                        elif mode == _STAGE1:
                            for c in range(na):
                                kv = b + w0 * SS[src, r0, c] * SS[src, u0, c] + w1 * SS[src, r1, c] * SS[src, u1, c]
                                Acc[t, c] = kv
                                SS[dst, t, c] = SS[2, t, c] + a * kv
                        elif mode == _STAGE23:
                            for c in range(na):
                                kv = b + w0 * SS[src, r0, c] * SS[src, u0, c] + w1 * SS[src, r1, c] * SS[src, u1, c]
                                Acc[t, c] += 2.0 * kv
                                SS[dst, t, c] = SS[2, t, c] + a * kv
                        else:
                            lo = lower[t]
                            hi = upper[t]
                            for c in range(na):
                                kv = b + w0 * SS[src, r0, c] * SS[src, u0, c] + w1 * SS[src, r1, c] * SS[src, u1, c]
                                x = SS[2, t, c]
                                v = x + a * (Acc[t, c] + kv)
                                SS[0, t, c] = x
                                SS[2, t, c] = v
                                # Finite bounds: NaN and +-inf fail one of the two comparisons.
                                nbad += not ((v >= lo) & (v <= hi))
                    else:
                        if mode == _PLAIN:
                            for c in range(na):
                                KK[stage, t, c] = (b + w0 * SS[src, r0, c] * SS[src, u0, c]
                                                   + w1 * SS[src, r1, c] * SS[src, u1, c]
                                                   + w2 * SS[src, r2, c] * SS[src, u2, c]
                                                   + w3 * SS[src, r3, c] * SS[src, u3, c])
                        elif mode == _STAGE1:
                            for c in range(na):
                                kv = (b + w0 * SS[src, r0, c] * SS[src, u0, c]
                                      + w1 * SS[src, r1, c] * SS[src, u1, c]
                                      + w2 * SS[src, r2, c] * SS[src, u2, c]
                                      + w3 * SS[src, r3, c] * SS[src, u3, c])
                                Acc[t, c] = kv
                                SS[dst, t, c] = SS[2, t, c] + a * kv
                        elif mode == _STAGE23:
                            for c in range(na):
                                kv = (b + w0 * SS[src, r0, c] * SS[src, u0, c]
                                      + w1 * SS[src, r1, c] * SS[src, u1, c]
                                      + w2 * SS[src, r2, c] * SS[src, u2, c]
                                      + w3 * SS[src, r3, c] * SS[src, u3, c])
                                Acc[t, c] += 2.0 * kv
                                SS[dst, t, c] = SS[2, t, c] + a * kv
                        else:
                            lo = lower[t]
                            hi = upper[t]
                            for c in range(na):
                                kv = (b + w0 * SS[src, r0, c] * SS[src, u0, c]
                                      + w1 * SS[src, r1, c] * SS[src, u1, c]
                                      + w2 * SS[src, r2, c] * SS[src, u2, c]
                                      + w3 * SS[src, r3, c] * SS[src, u3, c])
                                x = SS[2, t, c]
                                v = x + a * (Acc[t, c] + kv)
                                SS[0, t, c] = x
                                SS[2, t, c] = v
                                nbad += not ((v >= lo) & (v <= hi))
                # 3. Between the stages of stochastic Heun: the predictor.
                if method == 2 and stage == 0:
                    for i in range(n):
                        for c in range(na):
                            SS[1, i, c] = SS[2, i, c] + h * KK[0, i, c] + dW[i, c]
            if method == _RHS_ONLY:
                for c in range(na):
                    for i in range(n):
                        state[idx[c], i] = KK[0, i, c]
                return na
            if method == 1 or method == 2:
                for i in range(n):
                    lo = lower[i]
                    hi = upper[i]
                    for c in range(na):
                        x = SS[2, i, c]
                        if method == 2:
                            v = x + half * (KK[0, i, c] + KK[1, i, c]) + dW[i, c]
                        else:
                            v = x + h * KK[0, i, c] + dW[i, c]
                        SS[0, i, c] = x
                        SS[2, i, c] = v
                        nbad += not ((v >= lo) & (v <= hi))
            if nbad > 0:
                # Stop the members that failed (their last accepted state is in buffer 0) and
                # swap the last live member into their column.
                c = 0
                while c < na:
                    ok = True
                    for i in range(n):
                        v = SS[2, i, c]
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
                            state[m, i] = SS[0, i, c]
                        na -= 1
                        idx[c] = idx[na]
                        for i in range(n):
                            SS[2, i, c] = SS[2, i, na]
                            SS[0, i, c] = SS[0, i, na]
        if write:
            for c in range(na):
                m = idx[c]
                for q in range(keep.shape[0]):
                    out[m, j0 + j, q] = SS[2, keep[q], c]
    for c in range(na):
        for i in range(n):
            state[idx[c], i] = SS[2, i, c]
    return na
