"""ARMA polynomial algebra: a fitted model as filters, and the small regressions behind them.

:func:`polynomials` gives a model's full AR polynomial (differencing included)
and its MA polynomial; :func:`pi_weights` and :func:`psi_weights` expand them
into the pi(B) and psi(B) weights the detection step filters with
(:func:`linear_filter`).  :func:`interpolate_missing`, :func:`ols` and
``_long_ar_resid`` (the first, long-autoregression step of Hannan-Rissanen) are
shared by the estimation and the order choice.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from changekind.tasks.types import FittedModel

Order = tuple[int, int, int]
SeasonalOrder = tuple[int, int, int, int]


def polynomials(model: FittedModel) -> tuple[np.ndarray, np.ndarray]:
    """Full AR polynomial (with differencing) and MA polynomial, lag-0 first.

    statsmodels' sign convention: phi(B) = 1 - phi_1 B - ..., theta(B) = 1 + theta_1 B + ...
    """
    ar, ma = _arma_polys(dict(model.params), model.order, model.seasonal_order)
    d, (_, D, _, s) = model.order[1], model.seasonal_order
    if s:
        for _ in range(D):
            seas_diff = np.zeros(s + 1)
            seas_diff[0], seas_diff[s] = 1.0, -1.0
            ar = np.convolve(ar, seas_diff)
    for _ in range(d):
        ar = np.convolve(ar, [1.0, -1.0])
    return ar, ma


def _arma_polys(
    params: dict[str, float], order: Order, seasonal_order: SeasonalOrder
) -> tuple[np.ndarray, np.ndarray]:
    """AR and MA polynomials of the stationary part (no differencing), lag 0 first."""
    p, _, q = order
    P, _, Q, s = seasonal_order
    ar = np.array([1.0] + [-params.get(f"ar.L{i}", 0.0) for i in range(1, p + 1)])
    ma = np.array([1.0] + [params.get(f"ma.L{i}", 0.0) for i in range(1, q + 1)])
    if s:
        sar = np.zeros(s * P + 1)
        sar[0] = 1.0
        for i in range(1, P + 1):
            sar[i * s] = -params.get(f"ar.S.L{i * s}", 0.0)
        sma = np.zeros(s * Q + 1)
        sma[0] = 1.0
        for i in range(1, Q + 1):
            sma[i * s] = params.get(f"ma.S.L{i * s}", 0.0)
        ar = np.convolve(ar, sar)
        ma = np.convolve(ma, sma)
    return ar, ma


def linear_filter(b: np.ndarray, a: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``scipy.signal.lfilter(b, a, x)`` (zero initial state), with a fast path
    for a pure polynomial (``a == [1]``: a pure AR model's pi(B)), where lfilter
    takes a slow general route."""
    if len(a) == 1:
        return np.convolve(x, np.asarray(b, dtype=float) / a[0])[: len(x)]
    # Imported here, as everywhere in tasks/: scipy.signal costs about 0.7 s of
    # start-up that a command which filters nothing (a scan with nothing new) skips.
    from scipy.signal import lfilter

    return lfilter(b, a, x)


def pi_weights(model: FittedModel, n: int) -> np.ndarray:
    """Coefficients of pi(B) = phi(B) alpha(B) / theta(B), lag 0 first (pi_0 = 1)."""
    ar, ma = polynomials(model)
    impulse = np.zeros(n)
    impulse[0] = 1.0
    return linear_filter(ar, ma, impulse)  # no MA part: the AR polynomial itself


def impulse_responses(filters: Sequence[tuple[np.ndarray, np.ndarray]], n: int) -> np.ndarray:
    """``lfilter(b, a, impulse)`` for many filters at once, row by row: shape (len(filters), n).

    The same arithmetic in the same order as ``scipy.signal.lfilter``'s direct
    form II transposed (coefficients divided by ``a[0]``, then per step
    ``y = z_0 + b_0 x`` and ``z_i = z_{i+1} + b_{i+1} x - a_{i+1} y``), so each
    row equals lfilter's output bit for bit (tests/tasks/test_fit.py), with
    numpy over the filters instead of one call each.  What a scan's planning
    needs for every series' filter memory: 10,000 filters in a few
    milliseconds, and no scipy.signal import (0.7 s) for a small scan.
    """
    out = np.zeros((len(filters), n))
    groups: dict[int, list[int]] = {}
    for row, (b, a) in enumerate(filters):
        groups.setdefault(max(len(b), len(a)), []).append(row)
    for size, rows in groups.items():
        B, A = np.zeros((len(rows), size)), np.zeros((len(rows), size))
        for k, row in enumerate(rows):
            b, a = filters[row]
            B[k, : len(b)], A[k, : len(a)] = b, a
        a0 = A[:, :1].copy()
        B, A = B / a0, A / a0
        if size == 1:
            if n:
                out[rows, 0] = B[:, 0] * 1.0
            continue
        Z = np.zeros((len(rows), size - 1))
        for t in range(n):
            x = 1.0 if t == 0 else 0.0
            y = Z[:, 0] + B[:, 0] * x
            for i in range(size - 2):
                Z[:, i] = Z[:, i + 1] + x * B[:, i + 1] - y * A[:, i + 1]
            Z[:, size - 2] = x * B[:, size - 1] - y * A[:, size - 1]
            out[rows, t] = y
    return out


def psi_weights(model: FittedModel, n: int) -> np.ndarray:
    """Coefficients of psi(B) = theta(B) / (phi(B) alpha(B)), lag 0 first."""
    ar, ma = polynomials(model)
    impulse = np.zeros(n)
    impulse[0] = 1.0
    from scipy.signal import lfilter  # here: see linear_filter

    return lfilter(ma, ar, impulse)


def max_ma_root(params: Sequence[tuple[str, float]]) -> float:
    """Largest modulus of the inverse roots of the non-seasonal MA polynomial."""
    named = dict(params)
    coefs = [named[k] for k in sorted(named, key=_lag_key) if k.startswith("ma.L")]
    if not coefs:
        return 0.0
    roots = np.roots(np.r_[1.0, coefs])
    return float(np.max(np.abs(roots))) if roots.size else 0.0


def _lag_key(name: str) -> int:
    digits = "".join(ch for ch in name if ch.isdigit())
    return int(digits) if digits else 0


def interpolate_missing(y: np.ndarray) -> np.ndarray:
    """Linear interpolation over missing values (zeros if none is observed).

    For the tests, the order search and the warm path's linear filter only;
    estimation itself lets the Kalman filter skip missing values.
    """
    y = np.asarray(y, dtype=float)
    ok = ~np.isnan(y)
    if ok.all():
        return y
    if not ok.any():
        return np.zeros_like(y)
    idx = np.arange(y.size)
    return np.interp(idx, idx[ok], y[ok])


def _long_ar_resid(z: np.ndarray, m: int) -> np.ndarray:
    """Residuals of a long autoregression AR(m) by least squares (zeros for t < m)."""
    n = z.size
    resid = np.zeros(n)
    if m < 1 or n <= 2 * m:
        resid[:] = z
        return resid
    X = np.column_stack([z[m - i : n - i] for i in range(1, m + 1)])
    resid[m:] = z[m:] - X @ ols(X, z[m:])
    return resid


def ols(X: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Least-squares coefficients by the normal equations (SVD-based lstsq as fallback).

    The regressions here are small and well conditioned; the normal equations
    cost a fraction of LAPACK's SVD solver.
    """
    try:
        return np.linalg.solve(X.T @ X, X.T @ y)
    except np.linalg.LinAlgError:
        return np.linalg.lstsq(X, y, rcond=None)[0]
