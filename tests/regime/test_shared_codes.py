"""The side-by-side regimes share one set of the decisions' codes (:func:`decision_arrays`): the same arrays as each
fit built for itself before, and so the same fits, bit for bit. Source of truth: the expressions ``fit_q_learning``
passed to the fit before, written out below."""

import numpy as np
import pandas as pd
import pytest
from support.tiny import REPOSITORY

from regimewise.core.features import QFeatures, StateScaler, action_codes, episode_codes, patient_clusters
from regimewise.data.records import clean_decisions
from regimewise.demo.simulate import simulate_cohort
from regimewise.errors import StatisticalWarning
from regimewise.protocol import load_protocol
from regimewise.regime.learning import decision_arrays, fit_q_learning, variant_tasks
from regimewise.usual_care.fitting import fit_usual_care


def test_shared_codes_are_the_codes_each_fit_built_and_give_the_same_fits():
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    p = pf.protocol
    d = clean_decisions(pf, simulate_cohort(400, seed=9).decisions)
    arrays = decision_arrays(d, p)
    old = {
        "step": d["step"].to_numpy(dtype=np.int64),
        "action": action_codes(d, p.action_labels),
        "reward": p.reward.sign * d["reward"].to_numpy(dtype=float),
        "episode": episode_codes(d),
        "groups": pd.factorize(patient_clusters(d), sort=False)[0],
    }
    assert list(arrays) == list(old)
    for name, expected in old.items():
        assert arrays[name].dtype == expected.dtype and arrays[name].tobytes() == expected.tobytes(), name
    proba = fit_usual_care(d, p).record_proba
    features = QFeatures.from_protocol(StateScaler.fit(d, p), p, d)
    tasks = variant_tasks(d, proba, p, features)
    assert list(tasks)[-1] == "pessimistic"
    for name, task in tasks.items():
        shared = task()
        alone = fit_q_learning(d, proba, p, features, safeguards=name, oof_error=name == "pessimistic")
        assert shared.coef_.tobytes() == alone.coef_.tobytes()
        assert shared.record_choice_.tobytes() == alone.record_choice_.tobytes()
        assert shared.oof_mse_ == alone.oof_mse_


def test_q_values_kept_by_the_fit_are_those_predicted_again():
    # Source of truth: FittedQIteration.q_values of the training features after the fit, as the regime stage
    # computed them before; the fit keeps them for the protocol's learned regime (the last side-by-side one)
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    p = pf.protocol
    d = clean_decisions(pf, simulate_cohort(300, seed=4).decisions)
    proba = fit_usual_care(d, p).record_proba
    features = QFeatures.from_protocol(StateScaler.fit(d, p), p, d)
    X, step = features.transform(d), d["step"].to_numpy(dtype=np.int64)
    fits = {name: task() for name, task in variant_tasks(d, proba, p, features).items()}
    assert [name for name, fit in fits.items() if fit.record_q_ is not None] == ["pessimistic"]
    learned = fits["pessimistic"]
    expected = learned.q_values(X, step)
    assert learned.record_q_.dtype == expected.dtype and learned.record_q_.tobytes() == expected.tobytes()
    cold = fit_q_learning(d, proba, p, features, safeguards="pessimistic", oof_error=True)
    assert cold.record_choice_.tobytes() == learned.record_choice_.tobytes()  # keeping them changes no choice
    assert cold.coef_.tobytes() == learned.coef_.tobytes()
    # pooled mode predicts once after its iterations (three here: the check needs no converged fit)
    q_model = p.q_model.model_copy(update={"learning_mode": "pooled", "max_iterations": 3})
    pooled = p.model_copy(update={"q_model": q_model})
    with pytest.warns(StatisticalWarning, match="pooled fitted-Q iteration stopped after 3 iterations"):
        kept = fit_q_learning(d, proba, pooled, features, safeguards="rules", keep_q=True)
    assert kept.record_q_.tobytes() == kept.q_values(X, step).tobytes()
