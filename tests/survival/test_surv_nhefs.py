"""A published inverse-probability-weighted survival example: NHEFS, quitting smoking and death by 120 months.

Source: Hernán & Robins, Causal Inference: What If (2020), chapter 17, sections 17.1 and 17.4 (Programs 17.1 and
17.3); the values below were not checked against the printed edition, so treat them as from memory (hence the
tolerances):
crude 120-month survival 76.2% in quitters and 82.0% in non-quitters; stabilised weights with mean 1 ranging from
0.33 to 4.21; IP-weighted 120-month survival 80.7% under smoking cessation and 80.5% under no cessation
(difference 0.2%). Survival time in months: 120 if alive, else (yrdth - 83) * 12 + modth (the book's programs).
The book's weighted curve comes from a pooled logistic hazards model (time, time², and their products with
treatment); ours is the nonparametric weighted Kaplan–Meier, so the comparison with the book allows 0.3
percentage points, and the curve is also checked exactly against a hand-computed weighted proportion.
Data: ``causaldata.nhefs`` (1629 cigarette smokers, 318 deaths).
"""

import causaldata  # in the test extra: a missing install must fail, not skip
import numpy as np
import pytest
import statsmodels.api as sm
from support.nhefs import propensity_design
from surv_helpers import one_hot, point_treatment

from regimewise.survival import clone_censor_weight, contrast, make_timeline, survival_curve


@pytest.fixture(scope="module")
def nhefs():
    data = causaldata.nhefs.load_pandas().data
    months = np.where(data["death"] == 0, 120, (data["yrdth"] - 83) * 12 + data["modth"])
    return data.assign(months=months)


@pytest.fixture(scope="module")
def quit_probability(nhefs):
    """P(qsmk = 1 | L) from the logistic model of What If section 12.2 / 17.4, fitted with statsmodels."""
    design = propensity_design(nhefs)
    design = sm.add_constant(design)
    fit = sm.GLM(nhefs["qsmk"].astype(float), design, family=sm.families.Binomial()).fit()
    return fit.predict(design).to_numpy()


def test_data_and_propensity_model_match_the_book(nhefs, quit_probability):
    assert len(nhefs) == 1629 and int(nhefs["death"].sum()) == 318 and nhefs["months"].max() == 120
    action = nhefs["qsmk"].to_numpy()
    taken = np.where(action == 1, quit_probability, 1 - quit_probability)
    stabilised = np.where(action == 1, action.mean(), 1 - action.mean()) / taken
    assert stabilised.mean() == pytest.approx(1.0, abs=0.005)
    assert (stabilised.min(), stabilised.max()) == pytest.approx((0.33, 4.21), abs=0.006)


def _timeline(nhefs, quit_probability, rows=slice(None)):
    data = nhefs.iloc[rows] if isinstance(rows, slice) else nhefs[rows]
    decisions, episodes = point_treatment(data["seqn"], data["qsmk"], data["months"], data["death"])
    proba = np.column_stack([1 - quit_probability, quit_probability])
    return make_timeline(decisions, episodes, proba[np.arange(len(nhefs))[rows]], horizon=120)


def test_crude_curves_by_arm(nhefs, quit_probability):
    for arm, book in ((1, 0.762), (0, 0.820)):
        timeline = _timeline(nhefs, quit_probability, (nhefs["qsmk"] == arm).to_numpy())
        curve = survival_curve(clone_censor_weight(timeline), [120], 120)
        assert curve.at([120])[0] == pytest.approx(book, abs=6e-4)


def test_ip_weighted_curves_by_cloning(nhefs, quit_probability):
    timeline = _timeline(nhefs, quit_probability)
    n = len(nhefs)
    curves = {}
    for arm, book in ((1, 0.807), (0, 0.805)):
        table = clone_censor_weight(timeline, one_hot(np.full(n, arm), 2), name=f"qsmk={arm}")
        curves[arm] = survival_curve(table, [60, 120], 120)
        followers = (nhefs["qsmk"] == arm).to_numpy()
        weight = 1 / np.where(arm == 1, quit_probability, 1 - quit_probability)[followers]
        alive = (nhefs["death"] == 0).to_numpy()[followers]
        assert table.n_censored == n - followers.sum()
        assert curves[arm].at([120])[0] == pytest.approx(np.sum(weight * alive) / np.sum(weight), abs=1e-12)
        assert curves[arm].at([120])[0] == pytest.approx(book, abs=0.003)
    difference = contrast(curves[1], curves[0], [120]).survival_difference[0]
    assert difference == pytest.approx(0.002, abs=0.003)
