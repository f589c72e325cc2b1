"""The usual-care model with a categorical state against statsmodels' multinomial logit on patsy's treatment
coding of the same column."""

import numpy as np
import pandas as pd
import patsy
import statsmodels.api as sm
import statsmodels.formula.api as smf
from support.tiny import tiny_protocol_dict

from regimewise.protocol import Protocol
from regimewise.usual_care.fitting import fit_usual_care

LEVELS = ["a", "b", "c"]
ACTIONS = ["hold", "up", "down"]


def protocol():
    raw = tiny_protocol_dict()
    raw["states"].append(
        {"name": "x", "label": "Three levels", "kind": "categorical", "levels": LEVELS, "reference": "b"}
    )
    raw["behaviour_model"] = {"folds": 1}
    return Protocol.model_validate(raw)


def decisions(n=900, seed=4):
    """Made-up decisions whose actions depend on the level of x and on bp (logit model)."""
    rng = np.random.default_rng(seed)
    x = rng.choice(LEVELS, n)
    bp = rng.normal(140, 15, n)
    flag = rng.integers(0, 2, n).astype(float)
    step = np.tile([0, 1, 2], n // 3)
    eta = np.column_stack(
        [np.zeros(n), 0.8 * (x == "a") - 0.5 * (x == "c") + 0.03 * (bp - 140), 0.6 * (x == "c") - 0.4 * flag]
    )
    proba = np.exp(eta) / np.exp(eta).sum(axis=1, keepdims=True)
    action = np.array([rng.choice(3, p=row) for row in proba])
    return pd.DataFrame(
        {
            "episode_id": np.repeat([f"E{i:04d}" for i in range(n // 3)], 3),
            "patient_id": np.repeat([f"P{i:04d}" for i in range(n // 3)], 3),
            "step": step,
            "day": step * 90,
            "bp": bp,
            "flag": flag,
            "x": x,
            "action": np.asarray(ACTIONS)[action],
            "reward": rng.normal(size=n),
        }
    )


def test_design_has_patsy_treatment_coding_and_mnlogit_equals_statsmodels():
    p, frame = protocol(), decisions()
    usual_care = fit_usual_care(frame, p)
    X = usual_care.design.transform(frame)
    assert usual_care.design.names == ["bp", "flag", "x[a]", "x[c]", "step_fraction"]
    dummies = np.asarray(patsy.dmatrix("C(x, Treatment(reference='b'))", frame))[:, 1:]
    # Reference: patsy's treatment coding of x with reference 'b'.
    np.testing.assert_allclose(X[:, 2:4], dummies, rtol=0, atol=1e-12)
    codes = frame["action"].map(ACTIONS.index).to_numpy()
    reference = sm.MNLogit(codes, sm.add_constant(X)).fit(disp=0, method="newton", maxiter=200)
    # Reference: statsmodels MNLogit on the same dummy design (intercept added by statsmodels).
    np.testing.assert_allclose(usual_care.model.params_, np.asarray(reference.params), rtol=1e-6, atol=1e-8)


def test_probabilities_equal_statsmodels_formula_mnlogit():
    p, frame = protocol(), decisions()
    usual_care = fit_usual_care(frame, p)
    data = frame.assign(code=frame["action"].map(ACTIONS.index))
    reference = smf.mnlogit("code ~ bp + flag + C(x, Treatment(reference='b')) + step", data).fit(disp=0)
    # Reference: statsmodels' formula API (patsy treatment coding, raw unscaled covariates); the scaling of bp and
    # the step changes the coefficients but not the fitted probabilities.
    expected = np.asarray(reference.predict(data))
    np.testing.assert_allclose(usual_care.predict_proba(frame), expected, rtol=0, atol=1e-7)
