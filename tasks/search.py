"""The per-time, per-type statistic search in the residuals (Chen and Liu 1993).

For residuals e = pi(B) y and an effect of type k at time T with residual
pattern h (changekind.tasks.effects), the effect estimate and its statistic are
omega(T) = sum h_j e_(T+j) / sum h_j^2 and tau = omega sqrt(sum h_j^2) / sigma,
computed for all times at once (FFT cross-correlations; direct sums for a short
tested tail).  :func:`inner_loop` takes the largest |tau| above the critical
value, removes its effect and searches again; :func:`joint` estimates the
candidates together by least squares on the residuals (O(n k)) and drops the
weakest below the critical value; :func:`weights_at` gives each type's support.

References
----------
Chen, C. and Liu, L.-M. (1993). Joint estimation of model parameters and
outlier effects in time series. JASA 88(421), 284-297.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np
from scipy.special import ndtr

from changekind.tasks.critical import CLIP, SPREAD_TYPES, Thresholds
from changekind.tasks.effects import EFFECTS, SEARCHED

DELTA_GRID = (0.35, 0.5, 0.6, 0.7, 0.8, 0.9)
"""TC decay rates profiled during the search; the final decay is refined
continuously within DELTA_BOUNDS."""

DELTA_BOUNDS = (0.3, 0.95)
"""Range of a TC's decay.  Below 0.3 the half-life is under 0.6 samples: the
effect is gone by the next point, which is an AO, and a TC free to take such a
decay takes AOs from the AO type (in the Monte Carlo with the charge below, 19
of 144 AOs were called TC with the decay free down to 0.05 and 0.2 in the
search's grid, 13 with this range; 4 sigma AO type accuracy 0.80 and 0.82)."""

TC_PENALTY = 0.4
"""Log-likelihood units charged to a TC for its estimated decay when the types
are compared.  AIC's charge for one parameter (1.0) made the engine call IO
what was TC: in the Monte Carlo at 4 sigma (480 points, Gaussian) TC type
accuracy 0.48 against 0.65 for the likelihood classifier told the true time,
orders and decay, IO 0.63 against 0.48.  A TC whose decay is near pi(B)'s own
memory is nearly an IO, so the charge sets the balance between the two.  Chosen
from the sweep -1, 0, 0.3, 0.4, 0.5, 0.7, 1 on the study's default seed (TC
0.48 -> 0.62 at 0.5, IO 0.63 -> 0.50) and checked on the held-out seed 777: at
0.4 TC 0.61 and IO 0.42 against the classifier's 0.62 and 0.40 (at 1.0: 0.42
and 0.54); see tests/benchmarks/RESULTS.md."""

LS_MARGIN = 2
"""Points after the first testable one before a level shift may be placed."""

MAX_INNER = 60
"""Events taken one at a time in one search (before the work budget's own cap)."""

EVENT_TYPES = SEARCHED


@dataclass(frozen=True, slots=True)
class Candidate:
    """An effect found by the search: where, which type, how large."""

    position: int
    kind: str
    delta: float | None = None
    omega: float = 0.0
    t: float = 0.0

    def pattern(self, pi: np.ndarray) -> np.ndarray:
        """This candidate's unit residual pattern under pi weights ``pi``."""
        return EFFECTS[self.kind].pattern(pi, delta=self.delta)

    def path(self, length: int, psi: np.ndarray | None = None) -> np.ndarray:
        """This candidate's unit series path over ``length`` points."""
        return EFFECTS[self.kind].path(length, delta=self.delta, psi=psi)


def residual_patterns(pi: np.ndarray, *, deltas: Sequence[float] = DELTA_GRID) -> dict:
    """Residual-space signature h of a unit effect of each type (lag 0 first).

    Returns a dict type -> array; ``"TC"`` maps to a dict delta -> array.
    """
    n = pi.size
    io = np.zeros(n)
    io[0] = 1.0
    if n <= DIRECT_TAIL:
        # h_delta[k] = sum_j delta^(k-j) pi[j]: one product for every decay.
        pad = np.zeros(2 * n - 1)
        pad[n - 1 :] = pi
        lower = np.lib.stride_tricks.sliding_window_view(pad, n)[:, ::-1]  # [k, j] = pi[k - j]
        powers = np.power.outer(np.asarray(deltas, dtype=float), np.arange(n)).T  # [j, d] = d^j
        tcs = lower @ powers
        tc = {d: tcs[:, i] for i, d in enumerate(deltas)}
    else:
        tc = {d: EFFECTS["TC"].pattern(pi, delta=d) for d in deltas}
    return {"AO": EFFECTS["AO"].pattern(pi), "LS": EFFECTS["LS"].pattern(pi), "IO": io, "TC": tc}


def tau_all(
    e: np.ndarray,
    w: np.ndarray,
    pats: dict,
    sigma: float,
    start: int = 0,
    *,
    cache: dict | None = None,
) -> dict[str, tuple[np.ndarray, np.ndarray, np.ndarray | None]]:
    """omega(T), tau(T) (and the best TC delta) for every time and type.

    Times before ``start`` are NaN when only a short tail is tested (a warm
    screen): the sums over the tail are then direct products, cheaper than
    the FFT correlations that serve a whole series.  ``cache`` (a dict the
    caller keeps while ``w`` and the patterns stay the same, as in the
    one-at-a-time search) holds the patterns' transforms and the
    denominators, so a repeated call transforms only the residuals.
    """
    n = e.size
    if cache is not None and "H" in cache:
        H = cache["H"]
    else:
        H = np.column_stack([pats["AO"], pats["LS"], *pats["TC"].values()])
        if cache is not None:
            cache["H"] = H
    if _direct_tail(n, start):
        num, den = _tail_sums(e * w, w, H, start)
    else:
        num, den = _fft_sums(e * w, w, H, cache)
    den = np.where(den > 1e-12, den, np.nan)
    omega = num / den
    tau = omega * np.sqrt(den) / sigma
    if start:
        omega[:start] = np.nan
        tau[:start] = np.nan
    out: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray | None]] = {}
    io = e * w
    io_tau = np.where(w > 0, io / sigma, np.nan)
    if start:
        io_tau[:start] = np.nan
    out["IO"] = (io, io_tau, None)
    for j, kind in enumerate(("AO", "LS")):
        out[kind] = (omega[:, j], tau[:, j], None)
    # The TC: the decay whose |tau| is largest, time by time (first on ties).
    tc_abs = _zero_nan(np.abs(tau[:, 2:]))
    pick = np.argmax(tc_abs, axis=1)
    rows = np.arange(n)
    grid = np.fromiter(pats["TC"], dtype=float)
    out["TC"] = (omega[rows, 2 + pick], tau[rows, 2 + pick], grid[pick])
    return out


DIRECT_TAIL = 256
"""Longest tested tail whose statistics are summed directly rather than by FFT."""


def _direct_tail(n: int, start: int) -> bool:
    """Only a short tail from ``start`` is tested: direct sums, patterns that long."""
    return start > 0 and n - start <= DIRECT_TAIL


def _fft_sums(
    x: np.ndarray, w: np.ndarray, H: np.ndarray, cache: dict | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """sum_k h[k] x[T+k] and sum_k h[k]^2 w[T+k] for every T and column h of H."""
    from scipy.fft import irfft, next_fast_len, rfft  # here: start-up of commands that test nothing

    n = x.size
    if cache is not None and "HF" in cache:
        size, HF, den = cache["size"], cache["HF"], cache["den"]
    else:
        size = next_fast_len(2 * n, real=True)
        HF = np.conj(rfft(H, size, axis=0))
        if w.min() < 1:
            WF = rfft(w, size)
            H2 = np.conj(rfft(H * H, size, axis=0))
            den = irfft(WF[:, None] * H2, size, axis=0)[:n]
        else:
            den = np.cumsum(H * H, axis=0)[::-1]
        if cache is not None:
            cache.update(size=size, HF=HF, den=den)
    X = rfft(x, size)
    num = irfft(X[:, None] * HF, size, axis=0)[:n]
    return num, den


def _tail_sums(
    x: np.ndarray, w: np.ndarray, H: np.ndarray, start: int
) -> tuple[np.ndarray, np.ndarray]:
    """The sums of :func:`_fft_sums` for T >= start only (rows before are zero)."""
    n = x.size
    m = n - start
    pad = np.zeros(2 * m - 1)
    pad[:m] = x[start:]
    A = np.lib.stride_tricks.sliding_window_view(pad, m)  # A[i, k] = x[start + i + k]
    Hm = H[:m]
    num = np.zeros((n, H.shape[1]))
    den = np.zeros((n, H.shape[1]))
    num[start:] = A @ Hm
    if w.min() < 1:
        pad[:m] = w[start:]
        den[start:] = np.lib.stride_tricks.sliding_window_view(pad, m) @ (Hm * Hm)
    else:
        den[start:] = np.cumsum(Hm * Hm, axis=0)[::-1]
    return num, den


def _zero_nan(x: np.ndarray) -> np.ndarray:
    """NaN as 0 (np.nan_to_num without its per-call overhead; values here are finite)."""
    return np.where(np.isnan(x), 0.0, x)


def _support(kind: str, t):
    """Log-likelihood support tau^2/2 of a type, a decaying one charged TC_PENALTY."""
    return 0.5 * t * t - (TC_PENALTY if EFFECTS[kind].decays else 0.0)


def _scores(taus: dict, where: np.ndarray | int) -> dict[str, np.ndarray]:
    """:func:`_support` of every type at positions."""
    return {kind: _support(kind, _zero_nan(taus[kind][1][where])) for kind in EVENT_TYPES}


def inner_loop(
    e: np.ndarray,
    w: np.ndarray,
    pi: np.ndarray,
    sigma: float,
    crit: float | Thresholds,
    start: int,
    *,
    ls_from: int | None = None,
    max_inner: int = MAX_INNER,
) -> tuple[list[Candidate], bool]:
    """Detect effects one at a time, removing each from the residuals (step 2a).

    Returns the candidates and whether the search stopped at ``max_inner``
    (more may remain above the critical value).

    ``ls_from`` is the first time a level shift may be placed (default two
    points after ``start``): a step at the very start of the data is the mean
    itself, and one a point later is an AO at the start.  ``crit`` is one
    critical |t| or, for heavy-tailed residuals, :class:`Thresholds` that give
    each type and time its own (an event is taken where |tau| is furthest
    above its own critical value).
    """
    n = e.size
    # A short tested tail needs the patterns only as far as the tail reaches.
    reach = n - start if _direct_tail(n, start) else n
    pats = residual_patterns(pi[:reach])
    e = e.copy()
    allowed = (w > 0) & (np.arange(n) >= start)
    ls_from = start + LS_MARGIN if ls_from is None else ls_from
    found: list[Candidate] = []
    cache: dict = {}
    limits = _as_thresholds(crit)
    bound = _bounds(limits, pats, n)
    for _ in range(max_inner):  # bounded: at least one event a pass
        taus = tau_all(e, w, pats, sigma, start, cache=cache)
        if limits.heavy:  # spread types on clipped residuals (Thresholds.for_spread)
            clipped = tau_all(
                np.clip(e, -CLIP * sigma, CLIP * sigma), w, pats, sigma, start, cache=cache
            )
            taus.update({kind: clipped[kind] for kind in SPREAD_TYPES})
        taus["LS"][1][:ls_from] = np.nan
        # |tau| over each type's own critical value: an event where it reaches 1.
        stacked = np.vstack([np.abs(_zero_nan(taus[k][1])) / bound(k, taus) for k in EVENT_TYPES])
        best = np.where(allowed, stacked.max(axis=0), 0.0)
        per_pass = 1 if len(found) < BATCH_FROM else BATCH
        picked = _far_apart(best, 1.0, per_pass, SEPARATION)
        if not picked:
            break
        for T in picked:
            scores = _scores(taus, T)
            kind = max(EVENT_TYPES, key=lambda k: scores[k])
            if stacked[EVENT_TYPES.index(kind), T] < 1.0:  # won on score, not above its value
                kind = EVENT_TYPES[int(np.argmax(stacked[:, T]))]
            omega = float(taus[kind][0][T])
            decays = EFFECTS[kind].decays
            delta = float(taus[kind][2][T]) if decays else None
            h = EFFECTS[kind].pattern(pi[: n - T], delta=delta) if decays else pats[kind]
            e[T:] -= omega * h[: n - T] * w[T:]
            found.append(Candidate(T, kind, delta, omega, float(taus[kind][1][T])))
            allowed[T] = False
        if len(found) >= max_inner:
            return found, True
    else:
        return found, True
    return found, False


BATCH_FROM = 10
"""Events taken strictly one at a time before the search takes several a pass."""

BATCH = 10
"""Events taken in one pass once BATCH_FROM have been found: the largest |tau|
at times at least SEPARATION apart.  A volatile series with a hundred events
otherwise pays a hundred full passes; the joint stage re-estimates the
events together afterwards, so taking several at once changes little."""

SEPARATION = 24
"""Least distance between events taken in the same pass."""


def _far_apart(score: np.ndarray, crit: float, most: int, separation: int) -> list[int]:
    """Up to ``most`` times with ``score >= crit``, largest first, ``separation`` apart."""
    T = int(np.argmax(score))
    if score[T] < crit:
        return []
    if most == 1:
        return [T]
    above = np.flatnonzero(score >= crit)
    picked: list[int] = []
    for t in above[np.argsort(-score[above], kind="stable")]:
        if all(abs(int(t) - p) >= separation for p in picked):
            picked.append(int(t))
            if len(picked) >= most:
                break
    return picked


def joint(
    e: np.ndarray,
    w: np.ndarray,
    pi: np.ndarray,
    sigma: float,
    crit: float | Thresholds,
    cands: list[Candidate],
    *,
    base: np.ndarray | None = None,
) -> list[Candidate]:
    """Estimate all candidates together; drop the weakest below ``crit`` (step 2b).

    Least squares of the residuals on the candidates' residual patterns
    (O(n k) to build, O(n k^2) to solve).  ``base`` holds columns estimated
    with them but never dropped (the mean's pattern, so a level shift's
    standard error carries the uncertainty of the level).  With
    :class:`Thresholds` each candidate is held to its own pattern's critical
    value, and the weakest is the one least far above its own.
    """
    cands = list(cands)
    if not cands:
        return []
    full = design(cands, pi, e.size)
    limits = _as_thresholds(crit)
    own = np.array(
        [
            (limits.for_spread if c.kind in SPREAD_TYPES else limits.for_pattern)(
                full[c.position :, j]
            )
            for j, c in enumerate(cands)
        ]
    )
    if base is not None:
        full = np.column_stack([full, base])
    Xw = full * w[:, None]
    gram = Xw.T @ Xw  # built once; dropping an event drops its row and column
    cross = Xw.T @ (e * w)
    k_base = 0 if base is None else base.shape[1]
    keep = list(range(len(cands)))
    while keep:
        idx = keep + list(range(len(cands), len(cands) + k_base))
        G = gram[np.ix_(idx, idx)]
        try:
            inv = np.linalg.inv(G)
        except np.linalg.LinAlgError:
            inv = np.linalg.pinv(G)
        coef = (inv @ cross[idx])[: len(keep)]
        se = sigma * np.sqrt(np.clip(np.diag(inv)[: len(keep)], 1e-300, None))
        t = coef / se
        need = own[keep]
        weakest = int(np.argmin(np.abs(t) / need if need.min() > 0 else np.abs(t)))
        if abs(t[weakest]) >= need[weakest]:
            pairs = zip((cands[i] for i in keep), coef, t, strict=True)
            return [replace(c, omega=float(o), t=float(tt)) for c, o, tt in pairs]
        del keep[weakest]
    return []


def _as_thresholds(crit: float | Thresholds) -> Thresholds:
    return crit if isinstance(crit, Thresholds) else Thresholds(float(crit))


def _bounds(limits: Thresholds, pats: dict, n: int):
    """``bound(kind, taus)``: each time's critical |t| for the type (a float when Gaussian)."""
    if not limits.heavy:
        return lambda kind, taus: limits.gaussian
    fixed = {kind: limits.along(pats[kind], n) for kind in SEARCHED if not EFFECTS[kind].clipped}
    fixed["LS"] = limits.spread_along(pats["LS"], n)
    grid = np.fromiter(pats["TC"], dtype=float)
    tc = np.column_stack([limits.spread_along(pats["TC"][d], n) for d in grid])
    rows = np.arange(n)

    def bound(kind: str, taus: dict) -> np.ndarray:
        if not EFFECTS[kind].decays:
            return fixed[kind]
        delta = np.nan_to_num(taus["TC"][2], nan=float(grid[0]))
        return tc[rows, np.clip(np.searchsorted(grid, delta), 0, grid.size - 1)]

    return bound


def design(cands: Sequence[Candidate], pi: np.ndarray, n: int) -> np.ndarray:
    """Residual-space regressors of candidates, one column each."""
    X = np.zeros((n, len(cands)))
    for j, c in enumerate(cands):
        X[c.position :, j] = c.pattern(pi[: n - c.position])
    return X


Support = list[tuple[dict[str, float], float | None]]


def weights_for(
    e_clean: np.ndarray,
    w: np.ndarray,
    pi: np.ndarray,
    sigma: float,
    cands: Sequence[Candidate],
    *,
    ls_from: int,
    refine: bool = True,
) -> Support:
    """Support of each type at each candidate, from residuals with every effect removed.

    ``refine=False`` profiles the TC decay over DELTA_GRID only (for rounds
    whose weights only decide reclassification).
    """
    n = e_clean.size
    out = []
    for c in cands:
        own = np.zeros(n)  # put this candidate's own effect back
        own[c.position :] = c.omega * c.pattern(pi[: n - c.position])
        ls_ok = c.position >= ls_from
        out.append(
            weights_at(e_clean + own * w, w, pi, sigma, c.position, ls_ok=ls_ok, refine=refine)
        )
    return out


PULSE_REACH = 600
"""Lags over which an AO's and a TC's residual pattern are summed for the type
weights: a TC's decay is at most 0.95 (0.95^600 < 1e-13) and pi(B) of an
invertible model decays geometrically."""


def weights_at(
    e: np.ndarray,
    w: np.ndarray,
    pi: np.ndarray,
    sigma: float,
    T: int,
    *,
    ls_ok: bool = True,
    refine: bool = True,
) -> tuple[dict[str, float], float | None]:
    n = e.size
    seg_e = e[T:] * w[T:]
    seg_w = w[T:]
    reach = min(n - T, PULSE_REACH)  # AO and TC patterns have died out by then

    def tau_for(h: np.ndarray) -> float:
        m = h.size
        den = float(np.sum(h * h * seg_w[:m]))
        return float(np.dot(h, seg_e[:m])) / math.sqrt(den) / sigma if den > 1e-12 else 0.0

    taus = {
        "AO": tau_for(EFFECTS["AO"].pattern(pi[:reach])),
        "LS": tau_for(EFFECTS["LS"].pattern(pi[: n - T])) if ls_ok else 0.0,
        "IO": float(seg_e[0]) / sigma,
    }

    def tc_tau(d: float) -> float:
        return tau_for(EFFECTS["TC"].pattern(pi[:reach], delta=d))

    if refine:
        from scipy.optimize import minimize_scalar  # here: a screen with no event never needs it

        res = minimize_scalar(
            lambda d: -abs(tc_tau(d)),
            bounds=DELTA_BOUNDS,
            method="bounded",
            options={"xatol": 1e-3},
        )
        delta = float(res.x)
    else:
        delta = max(DELTA_GRID, key=lambda d: abs(tc_tau(d)))
    taus["TC"] = tc_tau(delta)
    scores = {k: _support(k, taus[k]) for k in EVENT_TYPES}
    top = max(scores.values())
    raw = {k: math.exp(v - top) for k, v in scores.items()}
    total = sum(raw.values())
    return {k: raw[k] / total for k in EVENT_TYPES}, delta


_TRIM = 3.0
_TRIM_SD = math.sqrt(
    1 - 2 * _TRIM * math.exp(-0.5 * _TRIM**2) / math.sqrt(2 * math.pi) / (2 * ndtr(_TRIM) - 1)
)


def robust_sigma(e: np.ndarray) -> float:
    """Residual scale that outliers do not inflate.

    The normalized MAD first (breakdown 50 %, but only 37 % efficient: its own
    noise, about 8 % at 480 points, adds false events), then the standard
    deviation of the residuals within 3 MADs of the median, corrected for the
    truncation (about 95 % efficient under normality).
    """
    centre = float(np.median(e))
    mad = 1.4826 * float(np.median(np.abs(e - centre)))
    if not mad > 0:
        return mad
    kept = e[np.abs(e - centre) <= _TRIM * mad]
    return float(np.sqrt(np.mean((kept - centre) ** 2))) / _TRIM_SD
