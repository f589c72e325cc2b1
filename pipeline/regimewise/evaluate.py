"""Off-policy values of the learned regime, usual care and the fixed 'always <action>' strategies.

Each regime is evaluated by the estimators the protocol names, all on one set of importance weights per
regime (:func:`regimewise.ope.evaluate_off_policy`). The doubly robust estimators use, as outcome model,
fitted-Q evaluation of the same regime (Le, Voloshin & Yue 2019) with the protocol's Q-model, so every regime
gets its own Q-function rather than borrowing the learned regime's; that fitted-Q evaluation is also reported
as an estimator of its own (``fqe``, the direct method). It uses no weights, but it carries the regime's weight
diagnostics: when few episodes follow the regime, its value rests on the Q-model's extrapolation.

An estimate whose Kish effective sample size is below ``max(30, 5% of episodes)`` is flagged ``low_ess``
(common practice, no single source; the issue tracker's default).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from .features import QFeatures, StateScaler, action_codes, episode_codes
from .fqi import FittedQEvaluation
from .ope import evaluate_off_policy
from .protocol import Protocol

ESTIMATOR_NAMES = {"pdwis": "PDWIS", "wdr": "WDR", "fqe": "FQE"}
MIN_RELIABLE_ESS = 30
MIN_RELIABLE_ESS_FRACTION = 0.05


@dataclass(frozen=True)
class LoggedDecisions:
    """The decision table as the arrays the estimators take (rows sorted by episode and step)."""

    X: np.ndarray
    step: np.ndarray
    action: np.ndarray
    reward: np.ndarray
    episode: np.ndarray
    patient: np.ndarray
    behaviour_proba: np.ndarray

    @classmethod
    def from_frame(cls, frame: pd.DataFrame, behaviour_proba: np.ndarray, protocol: Protocol) -> LoggedDecisions:
        return cls(
            X=QFeatures.from_protocol(StateScaler.fit(frame, protocol), protocol).transform(frame),
            step=frame["step"].to_numpy(dtype=np.int64),
            action=action_codes(frame, protocol.action_labels),
            reward=frame["reward"].to_numpy(dtype=float),
            episode=episode_codes(frame),
            patient=pd.factorize(frame["patient_id"], sort=False)[0],
            behaviour_proba=behaviour_proba,
        )

    @property
    def n_episodes(self) -> int:
        return int(self.episode.max()) + 1


def one_hot(codes: np.ndarray, n_actions: int) -> np.ndarray:
    out = np.zeros((len(codes), n_actions))
    out[np.arange(len(codes)), codes] = 1.0
    return out


def regime_targets(logged: LoggedDecisions, recommended: np.ndarray, labels: tuple[str, ...], fixed: bool):
    """(name, label, target probabilities) of every regime to evaluate, learned first."""
    k = len(labels)
    targets = [
        ("learned", "Learned regime", one_hot(recommended, k)),
        ("usual_care", "Usual care", logged.behaviour_proba),
    ]
    if fixed:
        targets += [
            (f"always_{a}", f"Always {a}", one_hot(np.full(len(recommended), j), k)) for j, a in enumerate(labels)
        ]
    return targets


def evaluate_regime(logged: LoggedDecisions, target: np.ndarray, protocol: Protocol, deterministic: bool) -> dict:
    """The protocol's estimators for one regime, as JSON-ready dicts with a low-ESS flag.

    ``n_following`` (episodes whose every action the regime takes with probability 1) is reported for
    deterministic regimes only; it is null for a stochastic regime such as usual care.
    """
    fqe = FittedQEvaluation(
        n_actions=len(protocol.actions), horizon=protocol.horizon, gamma=protocol.discount,
        alpha=protocol.q_model.ridge_alpha,
    ).fit(logged.X, logged.step, logged.action, logged.reward, logged.episode, target)  # fmt: skip
    q_taken, v_target = fqe.taken_and_target_values(logged.X, logged.step, logged.action, target)
    results = evaluate_off_policy(
        logged.step, logged.action, logged.reward, logged.episode, logged.behaviour_proba, target,
        horizon=protocol.horizon, gamma=protocol.discount, q_taken=q_taken, v_target=v_target,
    )  # fmt: skip
    first = logged.step == 0
    fqe_value = fqe.value_estimate(logged.X[first], target[first])
    results["FQE"] = replace(results["PDWIS"], estimator="FQE", value=fqe_value)
    floor = minimum_reliable_ess(logged.n_episodes)
    out = {}
    for name in protocol.evaluation.estimators:
        estimate = results[ESTIMATOR_NAMES[name]].to_dict()
        estimate["low_ess"] = bool(estimate["ess"] is None or estimate["ess"] < floor)
        if not deterministic:
            estimate["n_following"] = None
        out[name] = estimate
    return out


def minimum_reliable_ess(n_episodes: int) -> float:
    return float(max(MIN_RELIABLE_ESS, MIN_RELIABLE_ESS_FRACTION * n_episodes))


def observed_returns(logged: LoggedDecisions, gamma: float) -> np.ndarray:
    """Discounted return Σ_t γ^t r_t of each episode."""
    return np.bincount(logged.episode, weights=logged.reward * gamma**logged.step, minlength=logged.n_episodes)


def clustered_mean(values: np.ndarray, cluster: np.ndarray) -> tuple[float, float]:
    """Mean and its standard error with episodes clustered by patient (sandwich form, no small-sample factor)."""
    mean = float(values.mean())
    totals = np.bincount(cluster, weights=values - mean)
    return mean, float(np.sqrt(np.sum(totals**2)) / len(values))


def evaluate_all(frame: pd.DataFrame, behaviour_proba: np.ndarray, recommended: np.ndarray, protocol: Protocol) -> dict:
    """Values of every regime, usual care's observed mean return and the learned-minus-usual-care contrasts."""
    logged = LoggedDecisions.from_frame(frame, behaviour_proba, protocol)
    regimes = [
        {"name": name, "label": label, "estimates": evaluate_regime(logged, target, protocol, name != "usual_care")}
        for name, label, target in regime_targets(
            logged, recommended, protocol.action_labels, protocol.evaluation.fixed_strategies
        )
    ]
    returns = observed_returns(logged, protocol.discount)
    episode_patient = np.zeros(logged.n_episodes, dtype=np.int64)
    episode_patient[logged.episode] = logged.patient
    mean, se = clustered_mean(returns, episode_patient)
    learned, usual = regimes[0]["estimates"], regimes[1]["estimates"]
    contrasts = [
        {
            "regime": "learned",
            "versus": "usual_care",
            "estimator": name,
            "difference": None
            if learned[name]["value"] is None or usual[name]["value"] is None
            else learned[name]["value"] - usual[name]["value"],
            "low_ess": learned[name]["low_ess"],
        }
        for name in protocol.evaluation.estimators
    ]
    return {
        "discount": protocol.discount,
        "episodes": logged.n_episodes,
        "minimum_reliable_ess": minimum_reliable_ess(logged.n_episodes),
        "usual_care_observed": {"mean_return": mean, "se": se, "n_episodes": logged.n_episodes},
        "regimes": regimes,
        "contrasts": contrasts,
    }
