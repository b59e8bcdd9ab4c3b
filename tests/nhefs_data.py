"""NHEFS, the open dataset of Hernán & Robins, "Causal Inference: What If", as shipped by the
``causaldata`` package: 1,629 cigarette smokers examined in 1971 and again in 1982, followed for
death to 1992. Loaded once for every test that uses it.
"""

from __future__ import annotations

import functools

import pandas as pd
import pytest

#: Stored as strings in causaldata (FIELD_NOTES): cast to int on loading.
INTEGER_CODED = ("sex", "race", "education", "exercise", "active")
#: The propensity model of "What If", chapter 12 (Program 12.2): continuous terms as quadratics.
BOOK_COVARIATES = ["sex", "race", "age", "education", "smokeintensity", "smokeyrs", "exercise",
                   "active", "wt71"]
BOOK_KINDS = {"sex": "binary", "race": "binary", "age": "continuous", "education": "categorical",
              "smokeintensity": "continuous", "smokeyrs": "continuous", "exercise": "categorical",
              "active": "categorical", "wt71": "continuous"}


@functools.cache
def _load() -> pd.DataFrame:
    causaldata = pytest.importorskip("causaldata")
    d = causaldata.nhefs.load_pandas().data.copy()
    for c in INTEGER_CODED:
        d[c] = d[c].astype(int)
    return d


def load(complete: bool = False) -> pd.DataFrame:
    """A fresh copy; ``complete`` keeps the 1,566 persons whose weight change is measured."""
    d = _load().copy()
    if complete:
        d = d[d["wt82_71"].notna()].reset_index(drop=True)
    return d
