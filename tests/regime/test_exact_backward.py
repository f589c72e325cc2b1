"""The backward induction of fitted-Q iteration and the bootstrap fits' row gathers give the numbers they gave when
written the plain way, bit for bit.

Source of truth: the code as written before (``old_fit_backward``, ``old_out_of_fold``, ``old_weighted`` below): a
NaN-filled score table whose next-step scores are read back from it by the next rows, each step's scores masked by
the fitted actions of every row's step, the choices made on the whole table at the end, each step's out-of-fold error
on its rows gathered again after the fits, and a bootstrap fit's rows gathered whole and then multiplied by the
square roots of their weights.
"""

import numpy as np
import pytest

from regimewise.regime.fqi import FittedQIteration, QLearningSettings
from regimewise.regime.permitted import constrained_choice
from regimewise.regime.qmodels import ROOTED_BLOCK_ROWS, ActionCells, _gathered_rooted, _rooted, out_of_fold_errors


def old_weighted(cells, a, weight):
    """``ActionCells.weighted`` as written before: the kept rows gathered, then weighted in place."""
    if weight is None:
        return cells.design[a], cells.y[a]
    w = weight[cells.rows[a]]
    kept = np.flatnonzero(w > 0)
    return _rooted(cells.design[a][kept], cells.y[a][kept], w[kept])


@pytest.mark.parametrize("responses", [None, 3])
def test_blocked_weighting_gives_the_gathered_rows_weighted(responses):
    rng = np.random.default_rng(3)
    n = 3 * ROOTED_BLOCK_ROWS + 517  # several blocks and a short last one
    X = rng.normal(size=(n, 5))
    action = rng.integers(0, 3, n)
    y = rng.normal(size=n if responses is None else (n, responses))
    cells = ActionCells.gather(X, action, y, 3)
    weights = [
        rng.poisson(1.0, n).astype(float),
        rng.random(n) * (rng.random(n) < 0.7),  # weights that are not counts
        rng.random(n) < 0.6,  # a boolean weight (a fold's training rows)
        np.zeros(n),  # no row kept
    ]
    for weight in weights:
        for a in range(3):
            expected = old_weighted(cells, a, weight)
            got = cells.weighted(a, weight)
            for e, g in zip(expected, got):
                assert e.dtype == g.dtype and e.shape == g.shape and g.flags.c_contiguous
                assert e.tobytes() == g.tobytes()
    kept = np.flatnonzero(rng.random(cells.rows[0].size) < 0.5)
    w = rng.random(kept.size) + 0.5
    d, t = _gathered_rooted(cells.design[0], cells.y[0], kept, w)
    d_old, t_old = _rooted(cells.design[0][kept], cells.y[0][kept], w)
    assert d.tobytes() == d_old.tobytes() and t.tobytes() == t_old.tobytes()


def old_fit_backward(self, X, step, action, reward, next_row, proba, rules):
    """``FittedQIteration._fit_backward`` as written before, with the choices the old ``fit`` made from its scores."""
    target = reward.copy()
    self.models_ = [None] * self.horizon
    makers = [None] * self.horizon
    score = np.full((step.size, self.n_actions), np.nan)
    for t in range(self.horizon - 1, -1, -1):
        rows = np.flatnonzero(step == t)
        if not rows.size:
            continue
        later = next_row[rows]
        cont, later = rows[later >= 0], later[later >= 0]
        if cont.size:
            target[cont] = reward[cont] + self.settings.gamma * self._chosen_score(
                score[later], proba[later], None if rules is None else rules[later]
            )
        X_t = X[rows]
        self.models_[t], makers[t] = self._fit_model(X_t, action[rows], target[rows], rows)
        score[rows] = self._mask_unfitted(self._scores(self.models_[t], X_t), step[rows])
    self.n_iterations_, self.converged_ = self.horizon, True
    # the old fit then chose at every row from the whole table's scores
    return target, makers, constrained_choice(score, proba, self.settings.support_threshold, rules)


def old_out_of_fold(self, X, step, action, target, makers):
    """``FittedQIteration._out_of_fold`` as written before: each step's rows gathered out of X again."""
    folds = self._folds
    if self.settings.mode == "pooled":
        error = out_of_fold_errors(makers[0], self._pooled_X(X, step), action, target, folds)
        return {int(t): float(np.nanmean(error[step == t])) for t in np.unique(step)}
    out = {}
    for t in np.flatnonzero(np.bincount(step)):
        rows = np.flatnonzero(step == t)
        out[int(t)] = float(np.nanmean(out_of_fold_errors(makers[t], X[rows], action[rows], target[rows], folds[rows])))
    return out


class OldFittedQIteration(FittedQIteration):
    _fit_backward = old_fit_backward
    _out_of_fold = old_out_of_fold


def decision_table(seed, episodes=300, horizon=4, n_actions=3):
    """Episodes of 1 to ``horizon`` decisions (so some end early, and the last step is rare); the last action never
    taken at step 0 (an unfitted action there)."""
    rng = np.random.default_rng(seed)
    lengths = rng.integers(1, horizon + 1, episodes)
    episode = np.repeat(np.arange(episodes), lengths)
    step = np.concatenate([np.arange(k) for k in lengths])
    n = step.size
    action = rng.integers(0, n_actions, n)
    action[step == 0] = rng.integers(0, n_actions - 1, int((step == 0).sum()))
    X = rng.normal(size=(n, 4))
    reward = X[:, 0] * (action == 1) + rng.normal(size=n)
    proba = rng.dirichlet(np.ones(n_actions), size=n)
    rules = rng.random((n, n_actions)) < 0.75
    return X, step, action, reward, episode, proba, rules


@pytest.mark.parametrize(
    "settings",
    [
        QLearningSettings(support_threshold=0.0),
        QLearningSettings(support_threshold=0.2, gamma=0.9),
        QLearningSettings(support_threshold=0.2, pessimism=1.0, ensemble_size=5, oof_error=True),
        QLearningSettings(support_threshold=0.2, alpha="cv", oof_error=True),
        QLearningSettings(support_threshold=0.1, mode="pooled", max_iterations=5, oof_error=True),
    ],
)
@pytest.mark.parametrize("with_rules", [False, True])
def test_backward_induction_gives_the_fits_as_written_before(settings, with_rules):
    X, step, action, reward, episode, proba, rules = decision_table(5)
    rules = rules if with_rules else None
    fits = [
        cls(3, 4, settings, random_state=7).fit(X, step, action, reward, episode, proba, rules)
        for cls in (OldFittedQIteration, FittedQIteration)
    ]
    old, new = fits
    assert old.coef_.tobytes() == new.coef_.tobytes()
    assert old.record_choice_.tobytes() == new.record_choice_.tobytes()
    assert (old.n_changed_by_support_, old.n_without_permitted_action_) == (
        new.n_changed_by_support_,
        new.n_without_permitted_action_,
    )
    assert old.oof_mse_ == new.oof_mse_
    assert (old.oof_mse_ is None) == (not settings.oof_error)
    assert old.scores(X, step).tobytes() == new.scores(X, step).tobytes()
