"""Cross-fitted evaluation of the learned regime (cross_fitted_recommendations).

Source of truth for the statistical check: an exact answer. When every reward is independent noise with mean
zero, whatever the state and action, every regime's true value is exactly 0 (the expected sum of three
zero-mean rewards). A regime learned from such records picks the actions that happened to look good, so scoring
it on the same records is optimistic (selection bias; e.g. Chakraborty & Moodie 2013, Statistical Methods for
Dynamic Treatment Regimes, ch. 8, on the non-regularity and optimism of estimated optimal values, recalled from
memory); scoring each patient with a regime learned without that patient is not.
"""

import numpy as np
import pandas as pd
import pytest
from support.tiny import REPOSITORY, tiny_decisions, tiny_protocol_dict

from regimewise.core.folds import patient_folds
from regimewise.errors import UserInputError
from regimewise.evaluation.values import evaluate_all, point_values
from regimewise.protocol import Protocol
from regimewise.regime.learning import (
    cross_fit_tasks,
    cross_fitted_recommendations,
    crossfit_folds,
    fold_regime,
    learn_regime,
    score_by_step,
)
from regimewise.usual_care.fitting import fit_usual_care


def protocol(folds, **evaluation):
    raw = tiny_protocol_dict()
    raw["evaluation"] = {"estimators": ["pdwis", "wdr", "fqe"], "cross_fit_folds": folds, **evaluation}
    return Protocol.model_validate(raw)


def noise_decisions(n_episodes, seed):
    """Tiny-protocol records whose rewards are pure N(0, 1) noise: every regime's true value is 0."""
    d = tiny_decisions(n_episodes, seed=seed)
    d["reward"] = np.random.default_rng(10_000 + seed).standard_normal(len(d))
    return d


def test_each_fold_is_scored_by_the_regime_learned_without_it():
    p, d = protocol(3), tiny_decisions(120, seed=1)
    got = cross_fitted_recommendations(d, np.full((len(d), 3), 1 / 3), p)
    seed = int(np.random.SeedSequence(p.seed, spawn_key=(7,)).generate_state(1)[0])  # stream 'cross_fit' of core.seeds
    folds = patient_folds(d["patient_id"].to_numpy(), 3, seed)
    np.testing.assert_array_equal(crossfit_folds(d, p), folds)
    assert crossfit_folds(d, protocol(1)) is None
    assert set(np.unique(folds)) == {0, 1, 2}
    # a patient's records never straddle two folds
    assert (pd.Series(folds).groupby(d["patient_id"].to_numpy()).nunique() == 1).all()
    for k in range(3):
        rows = folds == k
        own = learn_regime(d.loc[~rows].reset_index(drop=True), p).recommend(d.loc[rows].reset_index(drop=True))
        np.testing.assert_array_equal(got[rows], own)


def test_one_fold_gives_the_in_sample_recommendations():
    p, d = protocol(1), tiny_decisions(60, seed=2)
    learned = learn_regime(d, p)
    proba = learned.usual_care.record_proba
    np.testing.assert_array_equal(cross_fitted_recommendations(d, proba, p), learned.recommend(d, proba))


def test_too_few_patients_for_the_folds_is_a_clear_error():
    with pytest.raises(UserInputError, match="cross_fit_folds is 10"):
        cross_fitted_recommendations(tiny_decisions(20, seed=3), np.full((60, 3), 1 / 3), protocol(10))


def test_cross_fitting_removes_the_optimism_of_scoring_a_regime_on_its_own_records():
    estimators = ["pdwis", "wdr", "fqe"]
    in_sample, cross_fitted = [], []
    for seed in range(24):
        d = noise_decisions(200, seed)
        p1, p2 = protocol(1), protocol(2)
        proba = fit_usual_care(d, p1).record_proba
        for p, out in ((p1, in_sample), (p2, cross_fitted)):
            rec = cross_fitted_recommendations(d, proba, p)
            folds = crossfit_folds(d, p)
            values = point_values(evaluate_all(d, proba, rec, p, strict=False, learned_folds=folds))
            out.append([values["learned"][e] for e in estimators])
    in_sample, cross_fitted = np.asarray(in_sample, dtype=float), np.asarray(cross_fitted, dtype=float)

    def se(x):
        return x.std(axis=0, ddof=1) / np.sqrt(x.shape[0])

    # Exact truth 0 for every regime; 3 Monte Carlo standard errors (common practice, no source). When this
    # test was written the in-sample means were 0.68, 0.71, 0.58 and the cross-fitted 0.04, 0.06, 0.07.
    for j, name in enumerate(estimators):
        assert in_sample[:, j].mean() > 3 * se(in_sample)[j], (name, in_sample[:, j].mean(), se(in_sample)[j])
        assert abs(cross_fitted[:, j].mean()) < 3 * se(cross_fitted)[j], (name, cross_fitted[:, j].mean())


def test_a_fold_without_the_recommended_action_names_the_fold_and_the_way_out():
    p, d = protocol(2), tiny_decisions(40, seed=5)
    folds = crossfit_folds(d, p)
    d.loc[(folds == 1) & (d["step"] == 2), "action"] = "hold"  # 'down' never taken at the last step of fold 2
    recommended = np.full(len(d), 2)  # always 'down'
    proba = np.full((len(d), 3), 1 / 3)
    with pytest.raises(UserInputError, match=r"cross-fitted evaluation, fold 2 of 2: .*cross_fit_folds") as err:
        evaluate_all(d, proba, recommended, p, learned_folds=folds)
    assert "\n" not in str(err.value)
    # not strict (bootstrap replicates): the model-based estimates are null instead of stopping the analysis
    values = point_values(evaluate_all(d, proba, recommended, p, strict=False, learned_folds=folds))
    assert values["learned"]["fqe"] is None and values["learned"]["wdr"] is None


def test_copies_of_a_patient_in_a_bootstrap_resample_share_a_fold():
    from regimewise.bootstrap.replicates import patient_groups, resample_patients

    d = tiny_decisions(60, seed=6)
    resample = resample_patients(d, patient_groups(d), np.random.default_rng(0), 30)
    assert resample["patient_id"].nunique() == 30  # copies are separate patients for the bootstrap ...
    folds = crossfit_folds(resample, protocol(2))
    # ... but never straddle two folds, so no fold regime is scored on a copy of a patient it learned from
    assert (pd.Series(folds).groupby(resample["resampled_from"].to_numpy()).nunique() == 1).all()
    assert resample["resampled_from"].nunique() < 30  # the draw did repeat patients


def test_held_out_rows_scored_step_by_step_get_the_numbers_of_the_whole_frame():
    # the demo protocol (pessimistic ensemble, clinical rules, splines in usual care): each fold's recommendations
    # and Q-values from cross_fit_tasks, which builds the Q-features one step at a time, equal bit for bit those of
    # the fold regime's own recommend and q_values on the whole held-out frame
    from regimewise.data.records import clean_decisions
    from regimewise.demo.simulate import simulate_cohort
    from regimewise.protocol import load_protocol

    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    p = pf.protocol
    d = clean_decisions(pf, simulate_cohort(600, seed=5).decisions)
    folds = crossfit_folds(d, p)
    for fold, task in zip(np.unique(folds), cross_fit_tasks(d, p, folds)):
        held_out, codes, q = task()
        np.testing.assert_array_equal(held_out, folds == fold)
        learned = fold_regime(d, p, folds, fold)
        rows = d.loc[held_out].reset_index(drop=True)
        expected_codes, expected_q = learned.recommend(rows), learned.q_values(rows)
        assert codes.dtype == expected_codes.dtype and q.dtype == expected_q.dtype
        assert codes.tobytes() == expected_codes.tobytes() and q.tobytes() == expected_q.tobytes()
    assert np.unique(rows["step"]).size == p.horizon  # every step was scored on its own
    shuffled = rows.sample(frac=1.0, random_state=0).reset_index(drop=True)  # steps interleaved in any order
    codes, q = score_by_step(learned, shuffled)
    assert codes.tobytes() == learned.recommend(shuffled).tobytes()
    assert q.tobytes() == learned.q_values(shuffled).tobytes()


def test_folds_warm_started_from_the_first_give_the_same_numbers_on_any_number_of_threads():
    # every fold after the first starts its usual-care fit from the first fold's model, which it waits for: two
    # threads must give the bytes one gives, and the Q-values of the fold regimes learned cold (the Q-models read
    # usual care's probabilities only through which actions are supported)
    from regimewise.core.concurrency import run_concurrently
    from regimewise.data.records import clean_decisions
    from regimewise.demo.simulate import simulate_cohort
    from regimewise.protocol import load_protocol

    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    p = pf.protocol.model_copy(update={"evaluation": pf.protocol.evaluation.model_copy(update={"cross_fit_folds": 3})})
    d = clean_decisions(pf, simulate_cohort(400, seed=8).decisions)
    folds = crossfit_folds(d, p)
    one = run_concurrently(cross_fit_tasks(d, p, folds), threads=1)
    two = run_concurrently(cross_fit_tasks(d, p, folds), threads=2)
    for (held, codes, q), (held2, codes2, q2) in zip(one, two):
        assert held.tobytes() == held2.tobytes() and codes.tobytes() == codes2.tobytes() and q.tobytes() == q2.tobytes()
    for fold, (held, codes, q) in zip(np.unique(folds), one):
        rows = d.loc[held].reset_index(drop=True)
        cold = fold_regime(d, p, folds, fold)
        np.testing.assert_array_equal(codes, cold.recommend(rows))
        np.testing.assert_allclose(q, cold.q_values(rows), rtol=1e-9, atol=1e-12)


def test_rows_of_a_mask_equal_the_reset_selection():
    from regimewise.regime.learning import rows_of

    d = tiny_decisions(30, seed=4)
    mask = np.random.default_rng(0).random(len(d)) < 0.4
    got = rows_of(d, mask)
    pd.testing.assert_frame_equal(got, d.loc[mask].reset_index(drop=True), check_index_type=True)
    got.loc[0, "bp"] = -1.0  # a copy: the records are not written
    assert (d["bp"] != -1.0).all()


def test_variant_tasks_let_go_of_x_and_build_it_again_when_rerun():
    import gc
    import weakref

    from regimewise.core.features import QFeatures, StateScaler
    from regimewise.regime.learning import variant_tasks

    p, d = protocol(2), tiny_decisions(60, seed=3)
    proba = np.full((len(d), 3), 1 / 3)
    features = QFeatures.from_protocol(StateScaler.fit(d, p), p, d)
    X = features.transform(d)
    tasks = variant_tasks(d, proba, p, features, X=X)
    first = {name: task() for name, task in tasks.items()}
    alive = weakref.ref(X)
    del X
    gc.collect()
    assert alive() is None  # no callable holds the features once each has run
    again = {name: task() for name, task in tasks.items()}  # run again: X built anew, the same fits
    for name in tasks:
        np.testing.assert_array_equal(again[name].record_choice_, first[name].record_choice_)
        np.testing.assert_array_equal(again[name].coef_, first[name].coef_)
