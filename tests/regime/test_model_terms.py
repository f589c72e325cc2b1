"""Per-model term lists and the shared-slope Q-model (issue 15), checked against statsmodels and a published
standardization example.

* The shared-slope Q-model with chosen action interactions, squares, a state-by-categorical interaction and a
  spline equals statsmodels OLS on the same terms written as a formula (patsy builds that design on its own), to
  1e-8, at one decision point and by backward induction over two.
* Standardization (the parametric g-formula at one time point) of the NHEFS smoking-cessation example of Hernán &
  Robins, *Causal Inference: What If* (2020), chapter 13, programs 13.2-13.4, on the NHEFS data the ``causaldata``
  package ships: the outcome model is a linear regression of weight gain on quitting (the action), 9 covariates,
  squares of four of them and quitting × smoking intensity; the standardized means under "everyone quits" and
  "no one quits" are the fitted-Q evaluation values of the two fixed strategies.
* The usual-care model's terms equal the same multinomial logit fitted by statsmodels MNLogit with the terms in a
  patsy formula.
* Bad term lists are refused in one line naming the key path (messages written for this project).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import patsy
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
import yaml
from support.tiny import tiny_protocol_dict

from regimewise.core.features import QFeatures, StateScaler, action_codes, episode_codes
from regimewise.errors import ProtocolError
from regimewise.evaluation.fqe import FittedQEvaluation
from regimewise.evaluation.values import LoggedDecisions
from regimewise.protocol import load_protocol
from regimewise.usual_care.fitting import fit_usual_care


def _load(tmp_path, d):
    path = tmp_path / "protocol.yaml"
    path.write_text(yaml.safe_dump(d, sort_keys=False), encoding="utf-8")
    return load_protocol(path).protocol


# ---------------------------------------------------------------------------------------------- shared slopes
ACTIONS = ("hold", "up", "down")


def _study(horizon=1) -> dict:
    d = tiny_protocol_dict()
    d["horizon"] = horizon
    d["states"] = [
        {"name": "x", "label": "X", "kind": "continuous", "plausible_range": [-10, 10]},
        {"name": "z", "label": "Z", "kind": "continuous", "plausible_range": [-10, 10]},
        {"name": "g", "label": "G", "kind": "categorical", "levels": ["a", "b", "c"], "reference": "b"},
    ]
    d["q_model"] = {
        "terms": [{"state": "x", "power": 2}, {"interaction": ["x", "g"]}, {"spline": "z", "df": 4}],
        "action_slopes": "shared",
        "action_interactions": ["x", {"interaction": ["g", "x"]}],
    }
    return d


def _rows(n, horizon, seed=11) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame(
        {
            "episode_id": np.repeat([f"E{i:04d}" for i in range(n)], horizon),
            "step": np.tile(np.arange(horizon), n),
            "x": rng.normal(0, 2, n * horizon),
            "z": rng.uniform(-3, 3, n * horizon),
            "g": rng.choice(["a", "b", "c"], n * horizon),
            "action": rng.choice(ACTIONS, n * horizon),
        }
    )
    effect = {"hold": 0.0, "up": 1.0, "down": -0.5}
    frame["reward"] = (
        frame["x"] * frame["action"].map({"hold": 0.2, "up": 1.0, "down": -0.4})
        + np.sin(frame["z"])
        + frame["action"].map(effect)
        + (frame["g"] == "a") * frame["x"]
        + rng.normal(0, 1, len(frame))
    )
    return frame


RHS = (
    "C(action, Treatment('hold')) + x + I(x**2) + C(g, Treatment('b')) + x:C(g, Treatment('b'))"
    " + cr(z, df=4, constraints='center') + C(action, Treatment('hold')):x"
    " + C(action, Treatment('hold')):x:C(g, Treatment('b'))"
)


def _statsmodels_q(frame, y, knots_from=None):
    """Q(s, a) of every action from statsmodels OLS with the same terms written as a patsy formula; the spline's
    knots and centring come from ``knots_from`` (default: ``frame``), as ours come from the training decisions."""
    info = patsy.dmatrix(RHS, knots_from if knots_from is not None else frame).design_info
    design = lambda rows: np.asarray(patsy.build_design_matrices([info], rows)[0])  # noqa: E731
    fit = sm.OLS(np.asarray(y, dtype=float), design(frame)).fit()
    return np.column_stack([fit.predict(design(frame.assign(action=a))) for a in ACTIONS]), fit


def _ours(frame, protocol, target):
    features = QFeatures.from_protocol(StateScaler.fit(frame, protocol), protocol, frame)
    fqe = FittedQEvaluation(
        len(ACTIONS), protocol.horizon, alpha=0.0, slopes=features.action_slopes(protocol), action_labels=ACTIONS
    ).fit(
        features.transform(frame),
        frame["step"].to_numpy(),
        action_codes(frame, ACTIONS),
        frame["reward"].to_numpy(dtype=float),
        episode_codes(frame),
        target,
    )
    return fqe, features


def test_shared_slopes_equal_statsmodels_ols_at_one_decision(tmp_path):
    protocol = _load(tmp_path, _study())
    frame = _rows(600, 1)
    always_up = np.tile([0.0, 1.0, 0.0], (len(frame), 1))
    fqe, features = _ours(frame, protocol, always_up)
    reference, fit = _statsmodels_q(frame, frame["reward"].to_numpy())
    ours = fqe.q_values(features.transform(frame), frame["step"].to_numpy())
    # statsmodels OLS (patsy's own design: treatment coding, cr spline, the interactions) is the reference.
    np.testing.assert_allclose(ours, reference, rtol=0, atol=1e-8)
    # the same number of free parameters: a column too many or too few would change the fit somewhere
    slopes = features.action_slopes(protocol)
    n_ours = 1 + len(features.names) + (len(ACTIONS) - 1) * (1 + len(slopes.interactions))
    assert n_ours == len(fit.params)


def test_shared_slopes_backward_induction_equals_two_statsmodels_fits(tmp_path):
    protocol = _load(tmp_path, _study(horizon=2))
    frame = _rows(500, 2, seed=4)
    policy = np.tile([0.2, 0.5, 0.3], (len(frame), 1))  # a stochastic regime
    fqe, features = _ours(frame, protocol, policy)
    last, first = frame[frame.step == 1], frame[frame.step == 0]
    q1, _ = _statsmodels_q(last.reset_index(drop=True), last["reward"].to_numpy(), knots_from=frame)
    # pseudo-outcome r0 + Σ_a π(a|s1) Q1(s1, a) (Le, Voloshin & Yue 2019), by hand from the statsmodels fit
    pseudo = first["reward"].to_numpy() + q1 @ np.array([0.2, 0.5, 0.3])
    q0, _ = _statsmodels_q(first.reset_index(drop=True), pseudo, knots_from=frame)
    ours = fqe.q_values(features.transform(frame), frame["step"].to_numpy())
    np.testing.assert_allclose(ours[frame.step.to_numpy() == 1], q1, atol=1e-8)
    np.testing.assert_allclose(ours[frame.step.to_numpy() == 0], q0, atol=1e-8)


def test_separate_slopes_unchanged_by_terms_machinery(tmp_path):
    """With separate slopes each action's coefficients are its own OLS fit on its own rows (statsmodels)."""
    d = _study()
    d["q_model"] = {"terms": [{"state": "x", "power": 2}]}
    protocol = _load(tmp_path, d)
    frame = _rows(400, 1, seed=2)
    fqe, features = _ours(frame, protocol, np.tile([1.0, 0.0, 0.0], (len(frame), 1)))
    ours = fqe.q_values(features.transform(frame), frame["step"].to_numpy())
    for k, a in enumerate(ACTIONS):
        rows = frame[frame.action == a]
        fit = smf.ols("reward ~ x + I(x**2) + z + C(g, Treatment('b'))", data=rows).fit()
        np.testing.assert_allclose(ours[:, k], fit.predict(frame), atol=1e-8)


# ---------------------------------------------------------------------------------------------- NHEFS example
def _nhefs_protocol(tmp_path) -> tuple:
    nhefs = pytest.importorskip("causaldata.nhefs_complete").load_pandas().data
    frame = pd.DataFrame(
        {
            "episode_id": [f"S{int(s)}" for s in nhefs["seqn"]],
            "patient_id": [f"S{int(s)}" for s in nhefs["seqn"]],
            "step": 0,
            "sex": nhefs["sex"].astype(int),
            "race": nhefs["race"].astype(int),
            "age": nhefs["age"].astype(float),
            "education": nhefs["education"].astype(str),
            "smokeintensity": nhefs["smokeintensity"].astype(float),
            "smokeyrs": nhefs["smokeyrs"].astype(float),
            "exercise": nhefs["exercise"].astype(str),
            "active": nhefs["active"].astype(str),
            "wt71": nhefs["wt71"].astype(float),
            "action": np.where(nhefs["qsmk"] == 1, "quit", "continue"),
            "reward": nhefs["wt82_71"].astype(float),
        }
    )
    numeric = {"age": [18, 90], "smokeintensity": [0, 100], "smokeyrs": [0, 80], "wt71": [30, 200]}
    d = tiny_protocol_dict()
    d["horizon"] = 1
    d["actions"] = [{"label": "continue", "description": "kept smoking"}, {"label": "quit", "description": "quit"}]
    d["states"] = (
        [{"name": n, "label": n, "kind": "binary", "plausible_range": [0, 1]} for n in ("sex", "race")]
        + [{"name": n, "label": n, "kind": "continuous", "plausible_range": r} for n, r in numeric.items()]
        + [
            {"name": n, "label": n, "kind": "categorical", "levels": levels}
            for n, levels in (("education", ["1", "2", "3", "4", "5"]), ("exercise", ["0", "1", "2"]))
        ]
        + [{"name": "active", "label": "active", "kind": "categorical", "levels": ["0", "1", "2"]}]
    )
    d["q_model"] = {
        "terms": [{"state": n, "power": 2} for n in numeric],
        "action_slopes": "shared",
        "action_interactions": ["smokeintensity"],
    }
    d["evaluation"] = {"fqe_ridge_alpha": 0.0, "replicates": 0, "cross_fit_folds": 1}
    return nhefs, frame, _load(tmp_path, d)


BOOK_FORMULA = (
    "wt82_71 ~ qsmk + sex + race + age + I(age*age) + C(education) + smokeintensity"
    " + I(smokeintensity*smokeintensity) + smokeyrs + I(smokeyrs*smokeyrs) + C(exercise) + C(active) + wt71"
    " + I(wt71*wt71) + I(qsmk*smokeintensity)"
)


def test_nhefs_standardization_equals_the_book_model(tmp_path):
    nhefs, frame, protocol = _nhefs_protocol(tmp_path)
    # 1. The reference model reproduces the book: fitted on the 1,566 participants with follow-up weight and
    # standardized over all 1,629 (program 13.3 prints a mean of 2.56 under the observed actions, 1.66 if no one
    # quit; chapter 13's text gives the effect of quitting as 3.5 kg; values as published, checked here).
    full = pytest.importorskip("causaldata.nhefs").load_pandas().data
    book = smf.ols(BOOK_FORMULA, data=nhefs).fit()
    assert book.predict(full).mean() == pytest.approx(2.56, abs=0.005)
    untreated, treated = book.predict(full.assign(qsmk=0)).mean(), book.predict(full.assign(qsmk=1)).mean()
    assert untreated == pytest.approx(1.66, abs=0.005)
    assert treated - untreated == pytest.approx(3.5, abs=0.05)
    # 2. Our fitted-Q evaluation of "always quit" and "always continue" on the same records (a one-decision study:
    # fqe is standardization) equals that model's standardization over the records it reads (the 1,566).
    logged = LoggedDecisions.from_frame(frame, np.full((len(frame), 2), 0.5), protocol)
    values = {}
    for k, name in enumerate(("continue", "quit")):
        target = np.zeros((len(frame), 2))
        target[:, k] = 1.0
        fqe = FittedQEvaluation(2, 1, alpha=0.0, slopes=logged.slopes).fit(
            logged.X, logged.step, logged.action, logged.reward, logged.episode, target
        )
        values[name] = fqe.value_estimate(logged.X, target)
    assert values["continue"] == pytest.approx(book.predict(nhefs.assign(qsmk=0)).mean(), abs=1e-8)
    assert values["quit"] == pytest.approx(book.predict(nhefs.assign(qsmk=1)).mean(), abs=1e-8)


# ---------------------------------------------------------------------------------------------- usual care
def test_usual_care_terms_equal_statsmodels_mnlogit(tmp_path):
    d = _study()
    d["q_model"] = {}
    d["behaviour_model"] = {
        "folds": 1,
        "include_step": False,
        "probability_floor": 0.0,
        "terms": [{"state": "x", "power": 2}, {"interaction": ["x", "z"]}, {"interaction": ["g", "z"]}],
    }
    protocol = _load(tmp_path, d)
    rng = np.random.default_rng(8)
    frame = _rows(900, 1, seed=8)
    score = np.column_stack([np.zeros(len(frame)), 0.5 * frame.x - 0.2 * frame.x**2, 0.3 * frame.x * frame.z])
    proba = np.exp(score) / np.exp(score).sum(axis=1, keepdims=True)
    frame["action"] = [ACTIONS[rng.choice(3, p=p)] for p in proba]
    ours = fit_usual_care(frame, protocol).record_proba
    formula = "x + I(x**2) + z + C(g, Treatment('b')) + x:z + C(g, Treatment('b')):z"
    X = patsy.dmatrix(formula, frame, return_type="dataframe")
    y = pd.Categorical(frame["action"], categories=ACTIONS).codes
    reference = sm.MNLogit(y, X).fit(method="newton", disp=False, maxiter=200, tol=1e-12).predict(X)
    # statsmodels MNLogit with the same terms from patsy; both maximise the same likelihood
    np.testing.assert_allclose(ours, np.asarray(reference), atol=1e-6)


# ---------------------------------------------------------------------------------------------- bad input
def _with_q(**q):
    d = _study()
    d["q_model"] = q
    return d


BAD = {
    "undeclared state": (
        _with_q(terms=[{"state": "bmi", "power": 2}]),
        "q_model.terms[0]: 'bmi' is not a declared state",
    ),
    "power of a categorical": (
        _with_q(terms=[{"state": "g", "power": 2}]),
        "q_model.terms[0]: a power of categorical state 'g' adds nothing",
    ),
    "power the basis adds": (
        _with_q(basis="quadratic", terms=[{"state": "x", "power": 2}]),
        "q_model.terms[0]: x^2 is already in the model (q_model.basis adds it)",
    ),
    "term twice": (
        _with_q(terms=[{"interaction": ["x", "z"]}, {"interaction": ["z", "x"]}]),
        "q_model.terms[1]: z:x is already term 0",
    ),
    "self interaction": (_with_q(terms=[{"interaction": ["x", "x"]}]), "write {state: x, power: 2}"),
    "main effect as a term": (_with_q(terms=[{"state": "x"}]), "every state already enters as a main effect"),
    "two forms in one term": (
        _with_q(terms=[{"state": "x", "power": 2, "spline": "z"}]),
        "a term is one of {state: NAME, power: 2}",
    ),
    "interactions without shared slopes": (
        _with_q(action_interactions=["x"]),
        "q_model.action_interactions need action_slopes: shared",
    ),
    "interaction not a term": (
        _with_q(action_slopes="shared", action_interactions=[{"state": "x", "power": 2}]),
        "q_model.action_interactions[0]: x^2 is not a term of the Q-model",
    ),
    "interaction not a state": (
        _with_q(action_slopes="shared", action_interactions=["bmi"]),
        "q_model.action_interactions[0]: 'bmi' is not a declared state",
    ),
    "terms with boosting": (
        _with_q(kind="gradient_boosting", terms=[{"state": "x", "power": 2}]),
        "apply to the linear Q-model",
    ),
    "power with a spline": (
        _with_q(terms=[{"spline": "x"}, {"state": "x", "power": 2}]),
        "the spline already bends",
    ),
}


@pytest.mark.parametrize("case", sorted(BAD))
def test_bad_terms_are_one_line(tmp_path, case):
    d, fragment = BAD[case]
    with pytest.raises(ProtocolError) as info:
        _load(tmp_path, d)
    assert "\n" not in str(info.value) and fragment in str(info.value), str(info.value)


def test_usual_care_terms_refused_with_boosting_and_twice_splined(tmp_path):
    d = _study()
    d["behaviour_model"] = {"kind": "gradient_boosting", "terms": [{"state": "x", "power": 2}]}
    with pytest.raises(ProtocolError, match="behaviour_model.terms apply to the multinomial_logit model"):
        _load(tmp_path, d)
    d["behaviour_model"] = {"spline_states": ["x"], "terms": [{"spline": "x"}]}
    with pytest.raises(ProtocolError, match=r"behaviour_model.terms\[0\]: 'x' is already in behaviour_model"):
        _load(tmp_path, d)


# ---------------------------------------------------------------------------------------------- properties
def test_shared_ridge_treats_every_action_alike():
    """With a ridge penalty the actions' intercept shifts are not penalised, so which action is the reference
    does not change any action's fitted Q (a property the penalty must have; exact answer by relabelling)."""
    from regimewise.core.terms import ActionSlopes
    from regimewise.regime.qmodels import fit_actions

    rng = np.random.default_rng(3)
    X = rng.normal(size=(300, 3))
    design = np.column_stack([np.ones(300), X])
    action = rng.integers(0, 3, 300)
    y = X @ [1.0, -0.5, 0.2] + np.array([0.0, 2.0, -1.0])[action] + rng.normal(size=300)
    slopes = ActionSlopes(True, (1,))
    order = np.array([2, 0, 1])  # action k is called order[k] after relabelling
    first = fit_actions(design, action, y, 5.0, 3, slopes)
    relabelled = fit_actions(design, order[action], y, 5.0, 3, slopes)
    np.testing.assert_allclose(relabelled[order], first, atol=1e-10)
    # and the penalty does act on the slopes: a different fit from alpha = 0
    assert not np.allclose(fit_actions(design, action, y, 0.0, 3, slopes), first)


def test_regime_learns_with_shared_slopes_and_a_spline(tmp_path):
    from regimewise.regime.learning import learn_regime

    d = _study(horizon=2)
    d["behaviour_model"] = {"folds": 1, "terms": [{"interaction": ["x", "g"]}]}
    protocol = _load(tmp_path, d)
    frame = _rows(400, 2, seed=9)
    frame["patient_id"] = frame["episode_id"]
    learned = learn_regime(frame, protocol)
    recommended = learned.recommend(frame)
    assert recommended.shape == (len(frame),) and set(recommended) <= {0, 1, 2}
    # at the last step the learned Q equals the shared-slope OLS of the reward (statsmodels, as above)
    last = frame[frame.step == 1].reset_index(drop=True)
    q1, _ = _statsmodels_q(last, last["reward"].to_numpy(), knots_from=frame)
    np.testing.assert_allclose(learned.q_values(last), q1, atol=1e-8)


def test_features_read_by_rows_equal_the_rows_of_the_whole_matrix(tmp_path):
    # source: QFeatures.transform of the whole frame; a block of rows (in any order, by positions, a mask or a
    # slice) holds exactly those rows' numbers, with a categorical state, an interaction and a spline among the terms
    protocol = _load(tmp_path, _study(horizon=2))
    frame = _rows(150, 2).assign(patient_id=lambda f: f["episode_id"])
    proba = np.full((len(frame), len(ACTIONS)), 1 / len(ACTIONS))
    whole = LoggedDecisions.from_frame(frame, proba, protocol).X
    by_rows = LoggedDecisions.from_frame(frame, proba, protocol, feature_rows=True).X
    assert by_rows.shape == whole.shape and whole.shape[1] > 5
    positions = np.random.default_rng(5).permutation(len(frame))[:97]
    assert np.array_equal(by_rows[positions], whole[positions])
    assert np.array_equal(by_rows[frame["step"].to_numpy() == 1], whole[frame["step"].to_numpy() == 1])
    assert np.array_equal(by_rows[10:40], whole[10:40])
    assert np.array_equal(np.asarray(by_rows), whole)
