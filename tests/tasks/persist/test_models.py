"""The model cache and watermarks (tasks/persist/models.py).

Reference: the input itself (see this package's ``__init__``).
"""

from __future__ import annotations

from datetime import timedelta

import pytest
import sqlalchemy as sa

from changekind.tasks import persist
from changekind.tasks.errors import (
    ConfigError,
    ModelError,
)
from changekind.tasks.persist import (
    load_models,
    load_watermarks,
    save_models,
    update_watermarks,
)
from tests.tasks.persist.tables import T0, make_model

# --------------------------------------------------------------------------- models


def test_model_cache_round_trip(engine: sa.Engine) -> None:
    models = [make_model("a"), make_model("b", order=(0, 1, 1), fallback="baseline", aicc=None)]
    assert save_models(engine, models, watermarks={"a": "2024-03-01T11:00:00Z"}, fitted_at=T0) == 2
    loaded = load_models(engine)
    assert loaded == {m.series_id: m for m in models}
    assert load_models(engine, series_ids=["b", "zz"]) == {"b": models[1]}
    assert load_watermarks(engine) == {"a": "2024-03-01T11:00:00Z"}
    with engine.connect() as conn:
        row = (
            conn.execute(
                sa.select(persist.series_models).where(persist.series_models.c.series_id == "a")
            )
            .mappings()
            .one()
        )
    assert (row["arima_order"], row["sigma2"], row["nobs"], row["fitted_at"]) == (
        "(1,0,1)(0,1,1,24)",
        2.5,
        720,
        T0,
    )
    assert (row["fitted_through"], row["fingerprint"]) == ("2024-03-01T11:00:00Z", "a1b2c3")

    # A refit without a new watermark keeps the stored one; a new model replaces the old.
    refit = make_model("a", sigma2=2.0, nobs=744)
    save_models(engine, [refit], watermarks={}, fitted_at=T0 + timedelta(hours=1))
    assert load_models(engine, ["a"]) == {"a": refit}
    assert load_watermarks(engine, ["a"]) == {"a": "2024-03-01T11:00:00Z"}

    assert update_watermarks(engine, {"a": "2024-03-01T12:00:00Z", "zz": "x"}) == 1
    assert load_watermarks(engine) == {"a": "2024-03-01T12:00:00Z"}


def test_damaged_model_row_names_the_series(engine: sa.Engine) -> None:
    save_models(engine, [make_model("a")], watermarks={}, fitted_at=T0)
    with engine.begin() as conn:
        conn.execute(sa.update(persist.series_models).values(model_json='{"order": [1'))
    with pytest.raises(ModelError, match=r"series 'a': stored model is not JSON .* refit"):
        load_models(engine)


def test_two_models_for_one_series_are_refused(engine: sa.Engine) -> None:
    with pytest.raises(ConfigError, match=r"two models for series 'a'"):
        save_models(engine, [make_model("a"), make_model("a")], watermarks={}, fitted_at=T0)
