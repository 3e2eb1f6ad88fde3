"""Station record checks and the fixed-date balance-year calendar."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from firnline.errors import InputError
from firnline.forcing import build_forcing, read_station


def table(start="2016-10-01", end="2018-09-30", t=1.0, p=2.0):
    d = pd.date_range(start, end, freq="D")
    return pd.DataFrame({"date": d.strftime("%Y-%m-%d"), "temperature_c": str(t),
                         "precipitation_mm": str(p)})


def build(df, **kw):
    args = dict(source="st.csv", date_col="date", t_col="temperature_c", p_col="precipitation_mm",
                year_start="10-01", winter_end="04-30")
    args.update(kw)
    return build_forcing(df, **args)


def test_fixed_date_calendar():
    """Fixed-date system (Cogley et al. 2011, UNESCO-IHP glossary): year labelled by the year
    it ends in; winter 1 Oct - 30 Apr, summer 1 May - 30 Sep."""
    f = build(table())
    assert list(f.years) == [2017, 2018]
    assert f.n_days == 365 * 2
    i = f.day_index(pd.Timestamp("2017-04-30").date())
    assert f.winter[i] and not f.winter[i + 1]
    assert f.year_index[f.day_index(pd.Timestamp("2017-09-30").date())] == 0
    assert f.year_index[f.day_index(pd.Timestamp("2017-10-01").date())] == 1
    assert f.winter.sum() == 2 * 212


def test_partial_years_are_skipped_and_named():
    f = build(table("2016-11-15", "2019-03-01"))
    assert list(f.years) == [2018]
    assert any("2017" in n and "skipped" in n for n in f.notes)
    assert any("2019" in n and "skipped" in n for n in f.notes)


def test_no_complete_year():
    with pytest.raises(InputError, match="no complete balance year"):
        build(table("2017-01-01", "2017-06-30"))


@pytest.mark.parametrize("mutate,words", [
    (lambda df: df.drop(index=40), "no row for 2016-11-10"),
    (lambda df: pd.concat([df.iloc[:10], df.iloc[9:10], df.iloc[10:]]), "appears twice"),
    (lambda df: pd.concat([df.iloc[:10], df.iloc[11:12], df.iloc[10:11], df.iloc[12:]]), "sort the rows"),
    (lambda df: df.assign(temperature_c=df.temperature_c.where(df.index != 5, "")),
     "line 7 (2016-10-06): the temperature is empty"),
    (lambda df: df.assign(precipitation_mm=df.precipitation_mm.where(df.index != 5, "n/a")), "line 7"),
    (lambda df: df.assign(temperature_c="273.5"), "kelvin"),
    (lambda df: df.assign(temperature_c=df.temperature_c.where(df.index != 3, "55")), "outside -70..50"),
    (lambda df: df.assign(precipitation_mm=df.precipitation_mm.where(df.index != 8, "-1")), "negative"),
    (lambda df: df.assign(date=df.date.where(df.index != 2, "2016-13-01")), "line 4"),
])
def test_bad_records_name_the_line_or_date(mutate, words):
    df = mutate(table()).reset_index(drop=True)
    with pytest.raises(InputError, match=words.replace("(", r"\(").replace(")", r"\)")):
        build(df)


def test_missing_column_lists_the_columns(tmp_path):
    p = tmp_path / "st.csv"
    table().rename(columns={"temperature_c": "tmean"}).to_csv(p, index=False)
    with pytest.raises(InputError, match=r'no column "temperature_c".*"tmean"'):
        read_station(p, "date", "temperature_c", "precipitation_mm", "10-01", "04-30")
    f = read_station(p, "date", "tmean", "precipitation_mm", "10-01", "04-30")
    assert np.all(f.temperature_c == 1.0)


def test_clip_to_start_end():
    import datetime as dt
    f = build(table("2015-10-01", "2018-09-30"), start=dt.date(2016, 10, 1), end=dt.date(2017, 9, 30))
    assert list(f.years) == [2017]
