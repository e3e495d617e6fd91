"""The picture's layout: the series named on its axis, facts readable and off the data.

Reference: matplotlib (the renderer) lays the figure out; the checks read the
drawn extents of its artists in pixels (``get_window_extent`` after
``canvas.draw()``), so they test what a person sees, not what was asked for.
"""

from __future__ import annotations

import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg

from changekind.tasks.report import event_figure, slice_window
from changekind.tasks.report.figure import PANELS
from changekind.tasks.report.views import Verdict
from changekind.tasks.report.words import axis_label
from tests.tasks.report.pair import SERIES, T_UP, pair_event, pair_events, pair_model, pair_series

LONG_MODEL = (
    "ARIMA(2,0,1)(1,1,1)288 mean=34.51 ar.L1=0.8129 ar.L2=-0.1228 ma.L1=0.3311 "
    "ar.S.L288=0.1021 ma.S.L288=-0.8413 sigma=1.976"
)


def _drawn(**options):
    down, up, glitch = pair_events()
    fields = {name: getattr(up, name) for name in up.__slots__}
    fields["model"] = LONG_MODEL
    up = type(up)(**fields)
    data = pair_series()
    ts, values = slice_window(
        up, data["timestamp"], data["value"], model=pair_model(), neighbours=[down, glitch]
    )
    fig = event_figure(up, ts, values, pair_model(), neighbours=[down, glitch], **options)
    FigureCanvasAgg(fig).draw()  # the canvas savefig uses for PNG; lays the figure out
    return fig, {ax.get_label(): ax for ax in fig.axes}


def test_the_series_name_and_unit_label_the_y_axis():
    _, axes = _drawn(unit="messages")
    assert axes["series"].get_ylabel() == f"{SERIES} [messages]"
    assert axes["effect"].get_ylabel() == "effect [messages]"
    _, axes = _drawn()
    assert axes["series"].get_ylabel() == SERIES and axes["effect"].get_ylabel() == "effect"


def test_a_long_series_id_is_shortened_in_the_middle_keeping_both_ends():
    sid = "region-west/cluster-17/storage-array-0042/controller-b/write-latency-ms"
    label = axis_label(sid, "ms", width=48)
    assert len(label) == 48 and label.endswith("write-latency-ms [ms]")
    assert label.startswith("region-west/") and "…" in label


def test_facts_are_as_large_as_the_tick_labels_and_stay_in_their_panel():
    fig, axes = _drawn(unit="messages", verdict=Verdict("explained", "pool resize, ticket 88"))
    assert set(axes) == set(PANELS)
    renderer = fig.canvas.get_renderer()
    facts = axes["facts"]
    box = facts.get_window_extent(renderer)
    texts = [t for t in facts.texts if t.get_text().strip()]
    body = max(texts, key=lambda t: len(t.get_text()))
    assert "explained: pool resize, ticket 88" in " ".join(body.get_text().split())
    tick = axes["series"].get_yticklabels()[0]
    assert body.get_fontsize() >= tick.get_fontsize()
    others = [axes[name].get_window_extent(renderer) for name in ("series", "effect", "weights")]
    for text in texts:
        extent = text.get_window_extent(renderer)
        assert box.x0 <= extent.x0 and extent.x1 <= box.x1, text.get_text()[:40]
        assert box.y0 <= extent.y0 and extent.y1 <= box.y1, text.get_text()[:40]
        assert not any(extent.overlaps(other) for other in others)


def test_the_legend_sits_above_the_data_not_on_it():
    fig, axes = _drawn()
    renderer = fig.canvas.get_renderer()
    legend = axes["series"].get_legend().get_window_extent(renderer)
    data_area = axes["series"].get_window_extent(renderer)
    assert legend.y0 >= data_area.y1 - 1  # one pixel of rounding
    labels = [t.get_text() for t in axes["series"].get_legend().get_texts()]
    assert labels == [
        "observed",
        "with this event's effect removed",
        "this LS",
        "other LS of this series",
    ]


@pytest.mark.parametrize("points", [60, 300])
def test_dense_windows_drop_the_point_markers(points):
    data = pair_series().iloc[T_UP - points // 2 : T_UP + points // 2]
    up = pair_event(T_UP, "AO", 3.0, 8.0)
    fig = event_figure(up, data["timestamp"], data["value"], pair_model())
    observed = next(line for line in fig.axes[0].get_lines() if line.get_label() == "observed")
    assert (observed.get_marker() not in (None, "None", "")) == (points <= 120)
