"""The NHEFS propensity design of Hernán & Robins, Causal Inference: What If, Program 12.2 (shared by tests)."""

from __future__ import annotations

import pandas as pd


def indicators(column, prefix):
    """Indicator columns for a categorical variable, first level as reference (as R's factor() does)."""
    return pd.get_dummies(column, prefix=prefix, drop_first=True, dtype=float)


def propensity_design(nhefs):
    """The covariates of What If Program 12.2: squares for age, intensity, years, weight; three categoricals."""
    numeric = pd.DataFrame(
        {
            "sex": nhefs["sex"].astype(int),
            "race": nhefs["race"].astype(int),
            "age": nhefs["age"],
            "age_sq": nhefs["age"] ** 2,
            "smokeintensity": nhefs["smokeintensity"],
            "smokeintensity_sq": nhefs["smokeintensity"] ** 2,
            "smokeyrs": nhefs["smokeyrs"],
            "smokeyrs_sq": nhefs["smokeyrs"] ** 2,
            "wt71": nhefs["wt71"],
            "wt71_sq": nhefs["wt71"] ** 2,
        }
    )
    categorical = [indicators(nhefs[name], name) for name in ("education", "exercise", "active")]
    return pd.concat([numeric, *categorical], axis=1).astype(float)
