"""Fast exact suitability of a point-process model: per-variable piecewise-quadratic tables plus a small quadratic form."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

# Cells evaluated together (variable axis outermost; one float64 row is 1 MiB). Alone, the
# kernel is about as fast in pieces of 16 384 cells; but a streamed projection runs two
# blocks on two dask threads, and every NumPy call takes Python's GIL, so with short pieces
# the threads mostly wait on each other: bench/bench_pieces.py measured two 19 x 512 x 1024
# windows on two threads in 51-55 ms in pieces of 16 384 and 28-34 ms in pieces of 131 072
# (one window alone: 23-31 ms either way).
BLOCK_CELLS = 131072

# eta is capped before exp so 1 - exp(-exp(eta)) never overflows (same cap as the model)
ETA_CAP = 700.0


@dataclass(frozen=True)
class AdditiveTable:
    """The linear predictor of a point-process model rewritten per variable.

    With ``z_j = (x_j - mean_j) / scale_j`` (Phillips & Dudík 2008 features), the linear
    predictor plus offset is

        eta(x) = constant + sum_j g_j(z_j) + sum_{j<l} P_jl z_j z_l

    where ``g_j`` collects the linear, quadratic and hinge terms of variable ``j``. On the
    segment ``s`` between consecutive kept knots (``s`` = number of knots below ``z``)

        g_j(z) = intercept_j[s] + slope_j[s] * z + quadratic_j * z**2,

    because ``max(0, z - k)`` is ``z - k`` above ``k`` and 0 below, and ``max(0, k - z)``
    the reverse; the table is therefore exact, not an approximation.

    Attributes
    ----------
    mean, inv_scale : ndarray (n_vars,)
    knots : tuple of ndarray
        Sorted knots (z units) of each variable whose hinge coefficients are not all 0.
    intercepts, slopes : tuple of ndarray
        Per-segment coefficients, length ``len(knots[j]) + 1``.
    quadratic : ndarray (n_vars,)
    product : ndarray (n_vars, n_vars) or None
        Strictly upper-triangular matrix ``P`` of product-feature coefficients.
    constant : float
        Model intercept + offset + sum of segment-0 intercepts folded in where possible.
    """

    mean: np.ndarray
    inv_scale: np.ndarray
    knots: tuple
    intercepts: tuple
    slopes: tuple
    quadratic: np.ndarray
    product: np.ndarray | None
    constant: float

    @property
    def n_vars(self) -> int:
        return self.mean.size


def compile_pointprocess(mean, scale, knots, classes, coef, constant) -> AdditiveTable:
    """Turn feature-expansion parameters and coefficients into an :class:`AdditiveTable`.

    Parameters
    ----------
    mean, scale : array-like (n_vars,)
        Standardisation ``z = (x - mean) / scale``.
    knots : sequence of array-like
        Hinge knots per variable in z units (as fitted; empty without hinges).
    classes : sequence of str
        Feature classes in the order their columns appear in ``coef``: any of
        "linear" (p columns), "quadratic" (p), "product" (p(p-1)/2, pairs i<j in
        row-major order) and "hinge" (per variable: forward hinges ``max(0, z - k)`` for
        every knot, then reverse hinges ``max(0, k - z)``).
    coef : array-like (n_features,)
    constant : float
        Added to the linear predictor (model intercept + offset).

    Returns
    -------
    AdditiveTable

    References
    ----------
    Phillips, S.J., Anderson, R.P. & Schapire, R.E. (2006) Maximum entropy modeling of species
    geographic distributions. Ecological Modelling 190: 231–259.
    """
    mean = np.asarray(mean, dtype=np.float64)
    scale = np.asarray(scale, dtype=np.float64)
    coef = np.asarray(coef, dtype=np.float64)
    p = mean.size
    knots = [np.asarray(k, dtype=np.float64) for k in knots]
    linear = np.zeros(p)
    quadratic = np.zeros(p)
    product = None
    forward = [np.zeros(k.size) for k in knots]
    reverse = [np.zeros(k.size) for k in knots]
    pos = 0
    for cls in classes:
        if cls == "linear":
            linear = coef[pos:pos + p].copy()
            pos += p
        elif cls == "quadratic":
            quadratic = coef[pos:pos + p].copy()
            pos += p
        elif cls == "product":
            i, j = np.triu_indices(p, k=1)
            P = np.zeros((p, p))
            P[i, j] = coef[pos:pos + i.size]
            pos += i.size
            product = P if np.any(P) else None
        elif cls == "hinge":
            for j, k in enumerate(knots):
                forward[j] = coef[pos:pos + k.size]
                reverse[j] = coef[pos + k.size:pos + 2 * k.size]
                pos += 2 * k.size
        else:
            raise ValueError(f"feature class {cls!r} unknown")
    if pos != coef.size:
        raise ValueError(f"coef has {coef.size} entries; the feature classes need {pos}")
    kept_knots, intercepts, slopes = [], [], []
    for j, k in enumerate(knots):
        # a knot whose two hinges both have coefficient 0 (common under L1) does not bend
        # g_j: drop it, so variables without hinges skip the search entirely
        keep = (forward[j] != 0) | (reverse[j] != 0)
        order = np.argsort(k[keep], kind="stable")
        kk, f, r = k[keep][order], forward[j][keep][order], reverse[j][keep][order]
        # segment s (s knots below z): forward hinges 0..s-1 active, reverse hinges s..m-1
        cf = np.r_[0.0, np.cumsum(f)]                   # sum_{i<s} f_i
        cfk = np.r_[0.0, np.cumsum(f * kk)]             # sum_{i<s} f_i k_i
        rr = np.r_[np.cumsum(r[::-1])[::-1], 0.0]      # sum_{i>=s} r_i
        rrk = np.r_[np.cumsum((r * kk)[::-1])[::-1], 0.0]
        kept_knots.append(kk)
        slopes.append(linear[j] + cf - rr)
        intercepts.append(rrk - cfk)
    return AdditiveTable(mean=mean, inv_scale=1.0 / scale, knots=tuple(kept_knots),
                         intercepts=tuple(intercepts), slopes=tuple(slopes),
                         quadratic=quadratic, product=product, constant=float(constant))


@dataclass(frozen=True)
class _VariableTerms:
    """Terms of one variable in centred raw units ``u = x - mean`` (no division per cell).

    ``g(u) = linear * u + quadratic * u**2 + sum_k bends[k] * max(u, knots[k])`` plus a
    constant folded into :attr:`_Plan.constant`: a hinge ``max(0, u - k)`` is
    ``max(u, k) - k``, and on the segments between knots the sum of hinges reproduces
    :class:`AdditiveTable`'s per-segment slopes (each knot bends the slope by
    ``slopes[s + 1] - slopes[s]``).
    """

    index: int
    centre: float
    linear: float
    quadratic: float
    knots: np.ndarray
    bends: np.ndarray


@dataclass(frozen=True)
class _Plan:
    """What :func:`linear_predictor_table` evaluates: only variables with a nonzero term."""

    terms: tuple
    products: tuple        # ((slot_a, ((slot_b, coefficient), ...)), ...) product terms in u units, by row
    constant: float


# Above this many knots on one variable, np.interp (one search per cell) beats summing
# hinges (3 array passes per knot). Measured once on 32 768-cell blocks of smooth data:
# np.interp about 6 ns a cell, one array pass about 0.2 ns a cell, so break-even near 10.
HINGE_SUM_MAX_KNOTS = 12


def _plan(table: AdditiveTable) -> _Plan:
    scale = 1.0 / table.inv_scale
    active = []
    constant = table.constant
    for j in range(table.n_vars):
        inv = table.inv_scale[j]
        slopes, intercepts, knots_z = table.slopes[j], table.intercepts[j], table.knots[j]
        bends_z = np.diff(slopes)
        keep = bends_z != 0
        knots_u = knots_z[keep] * scale[j]
        bends_u = bends_z[keep] * inv
        # segment 0 line (valid left of every knot) + hinges: constant = intercept_0 - sum(bend * knot)
        constant += float(intercepts[0]) - float(np.sum(bends_u * knots_u))
        has_product = table.product is not None and (np.any(table.product[j]) or np.any(table.product[:, j]))
        term = _VariableTerms(j, float(table.mean[j]), float(slopes[0] * inv), float(table.quadratic[j] * inv * inv),
                              knots_u, bends_u)
        if term.linear or term.quadratic or knots_u.size or has_product:
            active.append(term)
    slot = {t.index: i for i, t in enumerate(active)}
    rows = {}
    if table.product is not None:
        for a, b in zip(*np.nonzero(table.product)):
            coef = float(table.product[a, b] * table.inv_scale[a] * table.inv_scale[b])
            rows.setdefault(slot[a], []).append((slot[b], coef))
    return _Plan(tuple(active), tuple((a, tuple(pairs)) for a, pairs in rows.items()), float(constant))


def linear_predictor_table(table: AdditiveTable, X, *, lower=None, upper=None,
                           block_cells: int = BLOCK_CELLS, mask_unused: bool = True) -> np.ndarray:
    """eta for every cell of ``X`` (n_vars, n_cells), float64; NaN where any variable is NaN.

    ``lower`` / ``upper`` (n_vars,) clamp each variable first when given. ``X`` may be
    float32 (as read from a grid); every sum is in float64. Cells are processed
    ``block_cells`` at a time with the variable axis outermost, so the working set is a
    few (n_vars, block_cells) arrays whatever the size of ``X``.

    Only variables with a nonzero coefficient are read. Each is centred (``u = x - mean``,
    converted to float64 in the same pass) and its piecewise-quadratic term evaluated as a
    quadratic plus a sum of ``bend * max(u, knot)`` hinges -- three array passes per knot,
    no per-cell search -- or, beyond :data:`HINGE_SUM_MAX_KNOTS` knots, with
    ``numpy.interp``. A cell missing a variable the model does not use still comes back
    NaN, so the valid area does not depend on the model; ``mask_unused=False`` skips that
    (one pass per unused variable) for a caller that masks non-finite cells itself.
    """
    X = np.asarray(X)
    if X.ndim != 2 or X.shape[0] != table.n_vars:
        raise ValueError(f"X: got shape {X.shape}; expected ({table.n_vars}, n_cells)")
    plan = _plan(table)
    n = X.shape[1]
    out = np.empty(n, dtype=np.float64)
    bounds = []
    for t in plan.terms:
        lo = -np.inf if lower is None else float(lower[t.index]) - t.centre
        hi = np.inf if upper is None else float(upper[t.index]) - t.centre
        bounds.append((lo, hi, lower is not None or upper is not None))
    unused = [j for j in range(table.n_vars) if j not in {t.index for t in plan.terms}] if mask_unused else []
    width = min(block_cells, max(n, 1))
    U = np.empty((max(len(plan.terms), 1), width))
    work = np.empty(width)
    work2 = np.empty(width)
    for start in range(0, n, block_cells):
        stop = min(start + block_cells, n)
        m = stop - start
        eta = out[start:stop]
        eta.fill(plan.constant)
        tmp = work[:m]
        for slot, (term, (lo, hi, clamp)) in enumerate(zip(plan.terms, bounds)):
            u = U[slot, :m]
            np.subtract(X[term.index, start:stop], term.centre, out=u, dtype=np.float64)
            if clamp:
                np.clip(u, lo, hi, out=u)  # NaN stays NaN
            if term.quadratic:
                np.multiply(u, term.quadratic, out=tmp)
                tmp += term.linear
                tmp *= u
                eta += tmp
            elif term.linear:
                np.multiply(u, term.linear, out=tmp)
                eta += tmp
            if term.knots.size > HINGE_SUM_MAX_KNOTS:
                eta += _hinges_interp(u, term.knots, term.bends)
            else:
                for knot, bend in zip(term.knots, term.bends):
                    np.maximum(u, knot, out=tmp)  # NaN propagates
                    tmp *= bend
                    eta += tmp
        # products grouped by row: eta += u_a * sum_b c_ab u_b, two passes per pair plus two
        # per row (no BLAS call: dask already runs one block per core)
        acc = work2[:m]
        for a, pairs in plan.products:
            (b0, c0), rest = pairs[0], pairs[1:]
            np.multiply(U[b0, :m], c0, out=acc)
            for b, coef in rest:
                np.multiply(U[b, :m], coef, out=tmp)
                acc += tmp
            acc *= U[a, :m]
            eta += acc
        if unused:
            # keep NaN where a variable the model ignores is missing: their sum times 0 is
            # NaN there and 0 elsewhere (summed in the input's dtype, one pass each)
            probe = np.array(X[unused[0], start:stop])
            for j in unused[1:]:
                probe += X[j, start:stop]
            probe *= 0
            eta += probe
    return out


def _hinges_interp(u, knots, bends) -> np.ndarray:
    """``sum_k bends[k] * max(u, knots[k])`` by linear interpolation between the knots.

    The sum is piecewise linear with its breaks at the knots: left of the first knot it
    is the constant ``sum(bends * knots)``, right of the last its slope is ``sum(bends)``.
    """
    values = np.array([np.sum(bends * np.maximum(k, knots)) for k in knots])
    inside = np.interp(u, knots, values)      # clamps to the end values outside the knots
    tail = np.maximum(u, knots[-1])
    tail -= knots[-1]
    tail *= bends.sum()
    return inside + tail


def cloglog(eta: np.ndarray) -> np.ndarray:
    """Suitability ``1 - exp(-exp(eta))`` (complementary log-log link), accurate at small eta.

    References
    ----------
    Fithian, W. & Hastie, T. (2013) Finite-sample equivalence in statistical models for
    presence-only data. Annals of Applied Statistics 7: 1917–1939.
    """
    return -np.expm1(-np.exp(np.minimum(eta, ETA_CAP)))


def _cloglog_inplace(eta: np.ndarray) -> np.ndarray:
    """:func:`cloglog` overwriting the float64 array ``eta`` (no temporaries)."""
    np.minimum(eta, ETA_CAP, out=eta)
    np.exp(eta, out=eta)
    np.negative(eta, out=eta)
    np.expm1(eta, out=eta)
    np.negative(eta, out=eta)
    return eta


def suitability_table(table: AdditiveTable, X, *, lower=None, upper=None,
                      block_cells: int = BLOCK_CELLS, mask_unused: bool = True) -> np.ndarray:
    """Suitability (0–1, float64) of the cells ``X`` (n_vars, n_cells); NaN stays NaN
    (``mask_unused``: see :func:`linear_predictor_table`)."""
    return _cloglog_inplace(linear_predictor_table(table, X, lower=lower, upper=upper,
                                                   block_cells=block_cells, mask_unused=mask_unused))


def predict_cells(predict_proba, X, *, lower=None, upper=None, batch_cells: int = 16_384) -> np.ndarray:
    """Suitability of ``X`` (n_vars, n_cells) through any ``predict_proba``, in cell batches.

    Cells with a NaN variable are not passed to the estimator and come back NaN. The
    batch bounds the feature matrix an estimator materialises.
    """
    X = np.asarray(X)
    out = np.full(X.shape[1], np.nan, dtype=np.float64)
    valid = np.flatnonzero(np.isfinite(X).all(axis=0))
    lo = None if lower is None else np.asarray(lower, dtype=np.float64)
    hi = None if upper is None else np.asarray(upper, dtype=np.float64)
    for start in range(0, valid.size, batch_cells):
        sel = valid[start:start + batch_cells]
        rows = X[:, sel].T.astype(np.float64)
        if lo is not None or hi is not None:
            np.clip(rows, lo, hi, out=rows)
        out[sel] = predict_proba(rows)[:, 1]
    return out


__all__ = ["AdditiveTable", "BLOCK_CELLS", "cloglog", "compile_pointprocess", "linear_predictor_table",
           "predict_cells", "suitability_table"]
