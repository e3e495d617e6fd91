"""Reading series a batch at a time, so memory holds one batch only."""

from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping, Sequence

import numpy as np
import pandas as pd

from changekind.tasks.fetch.reading import (
    _READERS,
    _check_batch_size,
    _check_ids,
    _check_windows,
    _read,
    _span_windows,
)
from changekind.tasks.fetch.times import _Axis
from changekind.tasks.fetch.values import _T, Bound, SeriesWindow, SourceSpec, Span


def iter_batches(
    spec: SourceSpec,
    series_ids: Sequence[str] | None,
    *,
    batch_size: int,
    start: Bound = None,
    end: Bound = None,
    context: Span | Mapping[str, Span] | None = None,
) -> Iterator[list[tuple[str, pd.DataFrame]]]:
    """Read series a batch at a time, so memory holds one batch only.

    Parameters are those of :func:`read_series`, plus ``batch_size`` (series
    per batch, >= 1).  Each batch is read by one pushed-down query when the
    iterator reaches it.  (A CSV source is scanned again for every batch, as
    CSV has no index: convert large fleets to Parquet.)

    Yields
    ------
    list of (series_id, DataFrame)
        One entry per requested series, in request order; each frame has
        columns ``timestamp``, ``value`` (empty when the series has no rows in
        the span).
    """
    size = _check_batch_size(batch_size)
    ids = _check_ids(series_ids) if series_ids is not None else None
    return _iterate(spec, ids, size, lambda chunk: _span_windows(chunk, start, end, context))


def iter_window_batches(
    spec: SourceSpec, windows: Sequence[SeriesWindow], *, batch_size: int
) -> Iterator[list[tuple[str, pd.DataFrame]]]:
    """:func:`read_windows` a batch at a time; yields as :func:`iter_batches`.

    The windows are sorted by start (open starts first) before they are cut
    into batches, so the series of one batch have close starts and its
    pushed-down condition stays tight; entries come in that order.
    """
    size = _check_batch_size(batch_size)
    wins = _check_windows(windows)
    axis = _Axis.of(spec)
    keys = {w.series_id: axis.bound(w.start, what="start") for w in wins}
    for w in wins:  # bad bounds fail here, before any reading
        axis.bound(w.end, what="end")
    wins.sort(key=lambda w: (0, 0) if keys[w.series_id] is None else (1, keys[w.series_id]))
    by_id = {w.series_id: w for w in wins}
    return _iterate(spec, list(by_id), size, lambda chunk: [by_id[s] for s in chunk])


def split_batches(items: Sequence[_T], batch_size: int) -> list[list[_T]]:
    """Cut ``items`` into consecutive lists of at most ``batch_size``."""
    size = _check_batch_size(batch_size)
    return [list(items[i : i + size]) for i in range(0, len(items), size)]


# ---------------------------------------------------------------------------
# Reading, shared by every kind
# ---------------------------------------------------------------------------


def _iterate(
    spec: SourceSpec,
    ids: list[str] | None,
    size: int,
    windows_for: Callable[[list[str]], list[SeriesWindow]],
) -> Iterator[list[tuple[str, pd.DataFrame]]]:
    reader = _READERS[spec.kind](spec)
    try:
        todo = reader.distinct_ids() if ids is None else ids
        for i in range(0, len(todo), size):
            chunk = todo[i : i + size]
            frame = _read(reader, spec, windows_for(chunk))
            yield _split(frame, chunk)
    finally:
        reader.close()


def _split(frame: pd.DataFrame, ids: Sequence[str]) -> list[tuple[str, pd.DataFrame]]:
    """Per-series frames of a frame sorted by series id (contiguous slices)."""
    body = frame[["timestamp", "value"]]
    sid = frame["series_id"].to_numpy()
    cuts = np.flatnonzero(sid[1:] != sid[:-1]) + 1
    starts = np.concatenate([[0], cuts]) if len(sid) else np.array([], dtype=int)
    ends = np.concatenate([cuts, [len(sid)]]) if len(sid) else np.array([], dtype=int)
    spans = {sid[a]: (a, b) for a, b in zip(starts.tolist(), ends.tolist(), strict=True)}
    out = []
    for series_id in ids:
        a, b = spans.get(series_id, (0, 0))
        out.append((series_id, body.iloc[a:b].reset_index(drop=True)))
    return out
