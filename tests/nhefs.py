"""The NHEFS data (National Health and Nutrition Examination Survey I Epidemiologic Follow-up Study;
Hernan & Robins, Causal Inference: What If, 2020, ch. 12-13) as a sqlmatch warehouse, from the
`nhefs_complete` data of the causaldata package (the 1,566 smokers of 1971 whose 1982 weight is
known; loaded from the installed package, never copied into this repository).

Shape: a units table (one row per person: the confounders of the book's models as columns, and an
enrolment date for those who quit smoking between 1971 and 1982, qsmk = 1, in January 1981, a date of ours; the
others never enrol) and an events table with one row per person dated mid-1982 carrying the
weight change 1971-82 in kg (wt82_71), summed in the post window as the outcome.
"""

from __future__ import annotations

import duckdb
import pandas as pd

# Hernan & Robins (2020), recalled from memory, not read from the book: the IP-weighted average
# effect of quitting on weight gain about 3.4 kg (95% CI about 2.4 to 4.5, ch. 12, robust
# standard error that treats the weights as known), standardisation about 3.5 kg (ch. 13); the
# stabilised weights have mean 0.999 and range about 0.33 to 4.30 (ch. 12).
BOOK_IPW = 3.4
BOOK_IPW_CI = (2.4, 4.5)
BOOK_STANDARDISED = 3.5
BOOK_STABILISED_MEAN = 0.999
BOOK_STABILISED_RANGE = (0.33, 4.30)

NUMERIC = ("sex", "race", "age", "smokeintensity", "smokeyrs", "wt71")
CATEGORICAL = ("education", "exercise", "active")
SQUARED = ("age", "smokeintensity", "smokeyrs", "wt71")


def nhefs_frame() -> pd.DataFrame:
    from causaldata import nhefs_complete

    d = nhefs_complete.load_pandas().data.copy()
    out = pd.DataFrame({"person_id": d.seqn.astype("int64"), "qsmk": d.qsmk.astype(int), "wt82_71": d.wt82_71.astype(float)})
    for c in NUMERIC:
        out[c] = d[c].astype(float)
    for c in CATEGORICAL:
        out[c] = d[c].astype(str)
    return out


def load_nhefs(database: str) -> pd.DataFrame:
    people = nhefs_frame()
    units = people.drop(columns=["qsmk", "wt82_71"]).assign(enrolled_on=pd.to_datetime(people.qsmk.map({1: "1981-01-15", 0: None})))
    events = pd.DataFrame({"person_id": people.person_id, "measured_on": pd.Timestamp("1982-06-30"), "weight_change": people.wt82_71})
    with duckdb.connect(database) as con:
        con.register("units_df", units)
        con.register("events_df", events)
        con.execute("CREATE TABLE smokers AS SELECT * FROM units_df")
        con.execute("CREATE TABLE weighings AS SELECT person_id, CAST(measured_on AS DATE) AS measured_on, weight_change FROM events_df")
    return people


def nhefs_spec(database: str, **matching) -> dict:
    """The book's treatment model: sex, race, age, education (5 levels), smokeintensity, smokeyrs,
    exercise (3), active (3), wt71, and the squares of age, smokeintensity, smokeyrs and wt71
    (attribute features written as SQL expressions)."""
    features = [{"name": c, "aggregate": "attribute", "attribute": c} for c in NUMERIC]
    features += [{"name": c, "aggregate": "attribute", "type": "categorical", "attribute": c} for c in CATEGORICAL]
    features += [{"name": f"{c}_sq", "aggregate": "attribute", "expression": f"{c} * {c}"} for c in SQUARED]
    return {
        "study": {"name": "nhefs", "work_schema": "sqlmatch", "database": database},
        "units": {"table": "smokers", "key": "person_id", "enrolled_on": "enrolled_on"},
        "events": {"table": "weighings", "unit_key": "person_id", "time": "measured_on"},
        "treatment": {"cohort": "1981-01"},
        "windows": {"unit": "month", "pre": 12, "post": 36},
        "features": features,
        "outcomes": [{"name": "weight_gain", "aggregate": "sum", "measure": "weight_change"}],
        "matching": {"method": "score_weighting", **matching},
        "propensity": {"terms": "linear"},  # the book's model as written (its squares are features above)
    }
