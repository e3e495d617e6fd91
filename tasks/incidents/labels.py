"""What the members of an incident share: label values over-represented among
them (hypergeometric upper tail, Holm's step-down adjustment).
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd

from changekind.tasks.errors import ConfigError
from changekind.tasks.incidents.inputs import fleet_labels
from changekind.tasks.incidents.values import (
    MIN_CARRIERS,
    MIN_MEMBER_SHARE,
    SHARED_ALPHA,
    FleetLabels,
    LabelShare,
    _check_alpha,
)
from changekind.tasks.types import round_sig

# --------------------------------------------------------------------------- shared attributes


def label_shares(
    members: Sequence[str],
    labels: FleetLabels | pd.DataFrame | Mapping[str, Mapping[str, Any]],
    *,
    alpha: float = SHARED_ALPHA,
) -> tuple[LabelShare, ...]:
    """The label values the members carry more often than the fleet does.

    Parameters
    ----------
    members : sequence of str
        Series ids of an incident's members (each once).
    labels : FleetLabels, pandas.DataFrame or mapping
        The fleet and its labels (see :func:`fleet_labels`).
    alpha : float, default=0.01
        Family-wise level: a value is shared when its Holm-adjusted p-value is
        at most ``alpha`` (and :data:`MIN_MEMBER_SHARE` of the members carry it).

    Returns
    -------
    tuple of LabelShare
        Every value tested, most significant first (adjusted p, then p, then
        more carriers, then label and value).

    Notes
    -----
    1. For each label, the members whose value is known (``n``) and the fleet's
       series whose value is known (``N``).
    2. Each value carried by at least :data:`MIN_CARRIERS` members (``k``, of
       ``K`` in the fleet) is tested: ``p = P(X >= k)``, ``X`` hypergeometric
       (population ``N``, ``K`` carriers, ``n`` draws), the chance of at least
       ``k`` carriers among ``n`` series drawn from the fleet at random.
    3. Holm's step-down adjustment over the ``m`` values tested: the ``i``-th
       smallest p (from 1) is multiplied by ``m - i + 1``, then made
       non-decreasing, capped at 1.
    4. Shared: adjusted p at most ``alpha`` and ``k >= MIN_MEMBER_SHARE * n``.

    References
    ----------
    Holm, S. (1979). Scandinavian Journal of Statistics 6, 65-70.
    """

    _check_alpha(alpha)
    fleet = fleet_labels(labels)
    pos = fleet.index
    ids = list(dict.fromkeys(str(m) for m in members))
    if len(ids) != len(members):
        raise ConfigError("members lists a series more than once; give each series once")
    absent = [s for s in ids if s not in pos]
    if absent:
        raise ConfigError(
            f"labels has no row for member series {', '.join(map(repr, absent[:3]))}; "
            "give every series of the fleet a row"
        )
    rows = [pos[s] for s in ids]
    tested: list[tuple[str, str, int, int, int, int]] = []
    for j, name in enumerate(fleet.names):
        # Step 1
        column = fleet.values[j]
        carried = Counter(v for v in (column[r] for r in rows) if v is not None)
        n = sum(carried.values())
        fleet_counts = dict(fleet.counts[j])
        # Step 2
        for value, k in carried.items():
            if k >= MIN_CARRIERS:
                tested.append((name, value, k, n, fleet_counts[value], fleet.known[j]))
    if not tested:
        return ()
    k_, n_, K_, N_ = (np.array([t[i] for t in tested], dtype=np.int64) for i in (2, 3, 4, 5))
    from scipy.stats import hypergeom  # here: scipy.stats is seconds of start-up

    p = np.clip(hypergeom.sf(k_ - 1, N_, K_, n_), 0.0, 1.0)
    # Step 3
    m = p.size
    order = np.argsort(p, kind="stable")
    stepped = np.minimum(1.0, np.maximum.accumulate(p[order] * (m - np.arange(m))))
    adjusted = np.empty(m)
    adjusted[order] = stepped
    # Step 4
    shares = [
        LabelShare(
            label=name,
            value=value,
            members_with=k,
            members_known=n,
            fleet_with=K,
            fleet_known=N,
            p_value=round_sig(float(p[i])),
            p_adjusted=round_sig(float(adjusted[i])),
            shared=bool(adjusted[i] <= alpha and k >= MIN_MEMBER_SHARE * n),
        )
        for i, (name, value, k, n, K, N) in enumerate(tested)
    ]
    shares.sort(key=lambda s: (s.p_adjusted, s.p_value, -s.members_with, s.label, s.value))
    return tuple(shares)
