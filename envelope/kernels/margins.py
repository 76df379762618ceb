"""Range-margin kernels: the mean latitude of the N most poleward (or equatorward) occupied cells, and its bootstrap."""

from __future__ import annotations

import numpy as np

from envelope.errors import InputError

__all__ = ["extreme_mean", "poleward_sign", "bootstrap_extreme_means"]


def poleward_sign(latitudes) -> float:
    """+1 when the occupied cells lie mostly in the northern hemisphere (poleward = north), else -1.

    Decided by the sign of the mean latitude; a mean of exactly 0 counts as north.
    """
    lat = np.asarray(latitudes, dtype=np.float64)
    lat = lat[np.isfinite(lat)]
    if lat.size == 0:
        raise InputError("latitudes: none is finite; expected the latitudes of occupied cells")
    return -1.0 if float(np.mean(lat)) < 0 else 1.0


def extreme_mean(values, n: int, *, largest: bool = True) -> float:
    """Mean of the ``n`` largest (or smallest) finite values.

    With ``values`` the poleward latitude (latitude times :func:`poleward_sign`) of the occupied
    cells, the ``n`` largest give the poleward margin and the ``n`` smallest the equatorward
    margin (Thomas & Lennon 1999, with n = 10; Hickling et al. 2006). Ties at the n-th value do
    not matter: tied cells share the value.

    References
    ----------
    Thomas, C.D. & Lennon, J.J. (1999) Birds extend their ranges northwards. Nature 399: 213.
    Hickling, R., Roy, D.B., Hill, J.K., Fox, R. & Thomas, C.D. (2006) The distributions of a
    wide range of taxonomic groups are expanding polewards. Global Change Biology 12: 450-455.

    Examples
    --------
    >>> extreme_mean([1.0, 5.0, 3.0, 4.0], 2)
    4.5
    >>> extreme_mean([1.0, 5.0, 3.0, 4.0], 2, largest=False)
    2.0
    """
    n = int(n)
    if n < 1:
        raise InputError(f"n: found {n}; expected a whole number of cells >= 1")
    v = np.asarray(values, dtype=np.float64).ravel()
    v = v[np.isfinite(v)]
    if v.size < n:
        raise InputError(f"n: {n} cells asked for but only {v.size} are occupied; expected at least {n}")
    if largest:
        part = np.partition(v, v.size - n)[v.size - n:]
    else:
        part = np.partition(v, n - 1)[:n]
    return float(np.mean(part))


def bootstrap_extreme_means(values, n: int, replicates: int, rng: np.random.Generator, *,
                            largest: bool = True) -> np.ndarray:
    """:func:`extreme_mean` of ``replicates`` bootstrap resamples (with replacement, same size) of ``values``.

    A resample repeats some cells and omits others, so its n extreme values may include a
    cell twice; that is the ordinary nonparametric bootstrap of the statistic (Efron &
    Tibshirani 1993, ch. 6). Extremes are not smooth statistics, so the percentile interval is
    approximate (common practice, no source for its coverage here).

    Returns
    -------
    ndarray of float, shape (replicates,).

    References
    ----------
    Efron, B. & Tibshirani, R.J. (1993) An Introduction to the Bootstrap. Chapman & Hall.
    """
    v = np.asarray(values, dtype=np.float64).ravel()
    v = v[np.isfinite(v)]
    if v.size < n:
        raise InputError(f"n: {n} cells asked for but only {v.size} are occupied; expected at least {n}")
    replicates = int(replicates)
    out = np.empty(replicates)
    for b in range(replicates):
        sample = v[rng.integers(0, v.size, v.size)]
        out[b] = extreme_mean(sample, n, largest=largest)
    return out
