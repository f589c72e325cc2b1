"""The adaptive m-out-of-n bootstrap resample size (Chakraborty, Laber & Zhao 2013, Biometrics 69:714): how
often the two best permitted actions are statistically indistinguishable, and the m that follows.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy import stats

from regimewise.core.features import action_codes
from regimewise.errors import UserInputError
from regimewise.protocol.model import Protocol
from regimewise.regime.learning import learn_regime, record_proba
from regimewise.regime.permitted import protocol_permitted

PRETEST_LEVEL = 0.001


# ---------------------------------------------------------------------------------------------- m out of n
def resample_size(decisions: pd.DataFrame, protocol: Protocol) -> dict:
    """Patients per resample: n, or the adaptive m of Chakraborty, Laber & Zhao (2013) if the protocol asks."""
    n = int(decisions["patient_id"].nunique())
    spec = protocol.evaluation
    if not spec.m_out_of_n:
        return {"method": "n-out-of-n", "n": n, "m": n, "p_hat": None, "alpha": None}
    q_model = protocol.q_model
    if q_model.kind != "linear" or getattr(q_model, "learning_mode", "backward") != "backward":
        raise UserInputError(
            "evaluation.m_out_of_n needs the least-squares Q-model fitted backward per decision point (its near-tie "
            "test uses their standard errors); set q_model.kind: linear and learning_mode: backward, or turn it off."
        )
    p_hat = nonregularity_share(decisions, protocol)
    return {
        "method": "adaptive m-out-of-n",
        "n": n,
        "m": adaptive_m(n, p_hat, spec.m_out_of_n_alpha),
        "p_hat": p_hat,
        "alpha": spec.m_out_of_n_alpha,
    }


def adaptive_m(n: int, p_hat: float, alpha: float) -> int:
    """m = ceil(n^((1 + α(1 − p̂)) / (1 + α))) (Chakraborty, Laber & Zhao 2013): n when p̂ = 0."""
    return min(n, math.ceil(n ** ((1 + alpha * (1 - p_hat)) / (1 + alpha)) - 1e-9))


def nonregularity_share(decisions: pd.DataFrame, protocol: Protocol) -> float:
    """p̂: share of decisions after the first where the two best permitted actions are not distinguishable.

    Tested by ``gap² ≤ χ²₁(1 − ν) Var̂(gap)`` with ν = 0.001 (Chakraborty, Laber & Zhao 2013), where the gap's
    variance adds the sandwich variances of the two actions' fitted Q-values (separate least-squares fits
    per step and action, the protocol's linear Q-model; the pseudo-outcomes are treated as fixed).
    """
    learned = learn_regime(decisions, protocol)
    proba = record_proba(learned, decisions)
    q = learned.q_values(decisions)
    step = decisions["step"].to_numpy(dtype=np.int64)
    taken = action_codes(decisions, protocol.action_labels)
    design = np.column_stack([np.ones(len(decisions)), learned.q_features.transform(decisions)])
    residual = (
        _pseudo_outcome(decisions, q, learned.recommend(decisions, proba), protocol) - q[np.arange(len(q)), taken]
    )
    masked = np.where(protocol_permitted(protocol, decisions, proba), q, -np.inf)
    top2 = np.argsort(-masked, axis=1)[:, :2]
    rows = np.flatnonzero((step > 0) & np.isfinite(masked[np.arange(len(q)), top2[:, 1]]))
    if rows.size == 0:
        return 0.0
    variance = np.zeros(rows.size)
    for column in (0, 1):
        variance += _fitted_variance(design, residual, step, taken, rows, top2[rows, column])
    gap = masked[rows, top2[rows, 0]] - masked[rows, top2[rows, 1]]
    return float(np.mean(gap**2 <= stats.chi2.ppf(1 - PRETEST_LEVEL, df=1) * variance))


def _pseudo_outcome(decisions, q, recommended, protocol):
    """r_t + γ Q̂_{t+1}(s_{t+1}, recommended action), r_t at an episode's last decision."""
    reward = decisions["reward"].to_numpy(dtype=float)
    episode = decisions["episode_id"].to_numpy()
    following = np.zeros(len(q))
    has_next = np.append(episode[1:] == episode[:-1], False)
    nxt = np.flatnonzero(has_next) + 1
    following[has_next] = q[nxt, recommended[nxt]]
    return reward + protocol.discount * following


def _fitted_variance(design, residual, step, taken, rows, action):
    """Sandwich variance of the fitted value x'β̂ of (step, action) at each of ``rows``."""
    out = np.full(rows.size, np.inf)
    for t, a in set(zip(step[rows].tolist(), action.tolist())):
        fit_rows = (step == t) & (taken == a)
        D, e = design[fit_rows], residual[fit_rows]
        bread = np.linalg.pinv(D.T @ D)
        cov = bread @ (D.T * e**2) @ D @ bread
        here = (step[rows] == t) & (action == a)
        x = design[rows[here]]
        out[here] = np.einsum("ij,jk,ik->i", x, cov, x)
    return out
