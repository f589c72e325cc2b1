"""Strategies derived from the learned regime that stay close enough to usual care for the records to judge them.

Each strategy is a stochastic regime: a probability π_e(a | s) for every action at every logged decision, built
from the learned regime's recommended action ``rec``, usual care's estimated probabilities p̂_b(a | s) and (for
the override strategy) the cross-fitted Q-values of the learned regime. Every estimator then takes π_e as it
takes any target: importance weights π_e/p̂_b, and fitted-Q evaluation backing up Σ_a π_e(a|s') Q(s', a)
(Precup, Sutton & Singh 2000; Jiang & Li 2016; Thomas & Brunskill 2016).

* **Partial adoption** (parameter ε): at each decision follow ``rec`` with probability ε, usual care otherwise,
  π_e = ε·1[a = rec] + (1 − ε)·p̂_b(a|s). The weight of a decision is 1 − ε + ε/p̂_b(rec|s) where usual care took
  ``rec`` and 1 − ε elsewhere, so it is bounded by 1 − ε + ε/p̂_b.
* **Override only when it matters** (parameter c): keep the action a the clinician would take unless the learned
  regime's estimated gain over it, Q̂(s, rec) − Q̂(s, a), exceeds c; then take ``rec``. This is a modified
  treatment policy d(a, s) that depends on the natural value of treatment (Haneuse & Rotnitzky 2013, Stat Med
  32:5260; Díaz, Williams, Hoffman & Schenck 2023, JASA 118:846; Young, Hernán & Robins 2014, Epidemiol Methods
  3:1). Its density ratio (Díaz et al. 2023) uses the density of the post-intervention action,
  g^d(a|s) = Σ_{a'} 1[d(a', s) = a] p̂_b(a'|s): writing O(s) = {a' ≠ rec : Q̂(s, rec) − Q̂(s, a') > c} for the
  overridden actions, π_e(a|s) = 0 for a in O(s), p̂_b(a|s) for every other a ≠ rec, and
  p̂_b(rec|s) + Σ_{a'∈O(s)} p̂_b(a'|s) for rec. The weight of a decision is therefore 1 where the clinician's
  action is kept, 0 where it would have been overridden, and 1 + Σ_{O(s)} p̂_b / p̂_b(rec|s) where the clinician
  took ``rec``; with few overridden decisions the weights stay near 1. The estimand is the expected return if
  every clinician decision had been replaced by d(natural action, state), natural actions arising as in usual
  care from the states the strategy produces.
* **Incremental propensity** (parameter δ > 0): multiply the odds of ``rec`` under usual care by δ,
  π_e(rec|s) = δ p / (δ p + 1 − p) with p = p̂_b(rec|s), every other action scaled by 1 / (δ p + 1 − p)
  (Kennedy 2019, JASA 114:645, for a binary treatment; here rec against all other actions). Weights ≤ max(δ, 1).

The Q-values of the override rule must be cross-fitted (each patient's gains from a regime learned without that
patient), as the learned regime itself is evaluated: a threshold rule built from Q-values fitted on the same
records would select on them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from regimewise.errors import UserInputError

FAMILIES = ("partial_adoption", "override_gain", "incremental_odds")


@dataclass(frozen=True)
class Strategy:
    """One strategy of the protocol's grid: its family, parameter, name, label and words for the report."""

    family: str
    parameter: float
    name: str
    label: str
    words: str

    def to_dict(self):
        return {"family": self.family, "parameter": self.parameter, "words": self.words}


def strategy(family: str, parameter: float) -> Strategy:
    """The :class:`Strategy` of ``family`` at ``parameter``, with its clinical wording."""
    if family == "partial_adoption":
        pct = f"{100 * parameter:g}%"
        return Strategy(
            family,
            parameter,
            f"partial_adoption_{parameter:g}",
            f"Learned regime at {pct} of reviews",
            f"if the learned regime had been followed at {pct} of reviews and usual care at the others",
        )
    if family == "override_gain":
        return Strategy(
            family,
            parameter,
            f"override_gain_{parameter:g}",
            f"Switch only if gain > {parameter:g}",
            f"if clinicians had switched to the learned regime's action only when its expected gain over their own "
            f"choice was more than {parameter:g} points",
        )
    if family == "incremental_odds":
        return Strategy(
            family,
            parameter,
            f"incremental_odds_{parameter:g}",
            f"Odds of learned action × {parameter:g}",
            f"if the odds of clinicians choosing the learned regime's action had been multiplied by {parameter:g}",
        )
    raise UserInputError(f"unknown strategy family {family!r}; use one of {', '.join(FAMILIES)}.")


def partial_adoption_proba(recommended, behaviour_proba, epsilon):
    """π_e = ε·1[a = rec] + (1 − ε)·p̂_b(a|s), shape (n, K)."""
    behaviour_proba = np.asarray(behaviour_proba, dtype=float)
    rows = np.arange(behaviour_proba.shape[0])
    out = (1.0 - epsilon) * behaviour_proba
    out[rows, recommended] += epsilon
    return _tidy(out)


def overridden_actions(recommended, q_values, threshold):
    """Boolean (n, K): actions a ≠ rec whose estimated loss against rec, Q̂(s, rec) − Q̂(s, a), exceeds c."""
    q_values = np.asarray(q_values, dtype=float)
    rows = np.arange(q_values.shape[0])
    gain = q_values[rows, recommended][:, None] - q_values
    out = gain > threshold
    out[rows, recommended] = False
    return out


def override_proba(recommended, q_values, behaviour_proba, threshold):
    """Density of the modified treatment policy's action, g^d(a|s) = Σ_{a'} 1[d(a', s) = a] p̂_b(a'|s), (n, K)."""
    behaviour_proba = np.asarray(behaviour_proba, dtype=float)
    rows = np.arange(behaviour_proba.shape[0])
    moved = overridden_actions(recommended, q_values, threshold)
    out = np.where(moved, 0.0, behaviour_proba)
    out[rows, recommended] += row_sums(np.where(moved, behaviour_proba, 0.0))
    return _tidy(out)


def incremental_proba(recommended, behaviour_proba, delta):
    """Odds of rec multiplied by δ: π_e(rec) = δp/(δp + 1 − p), others p̂_b(a)/(δp + 1 − p) (Kennedy 2019)."""
    behaviour_proba = np.asarray(behaviour_proba, dtype=float)
    rows = np.arange(behaviour_proba.shape[0])
    p = behaviour_proba[rows, recommended]
    scale = 1.0 / (delta * p + 1.0 - p)
    out = behaviour_proba * scale[:, None]
    out[rows, recommended] = delta * p * scale
    return _tidy(out)


def _tidy(proba):
    """Rows clipped to [0, 1] and renormalised: removes rounding that would leave a sum of 1 + 1e-16."""
    proba = np.clip(proba, 0.0, 1.0)
    return proba / row_sums(proba)[:, None]


SHORT_ROW = 8  # numpy adds a row of fewer values one after the other, in any memory layout (row_sums)


def row_sums(values) -> np.ndarray:
    """``numpy.sum(values, axis=1)`` of a 2-D float array, bit for bit, added a column at a time.

    numpy adds a row of fewer than :data:`SHORT_ROW` values one value after the other, starting from +0.0, in any
    memory layout (a longer row of a row-major array is added pairwise). On a row-major (m, K) array it does so one
    short row at a time, several times slower than adding whole columns in that order, as here; longer rows are
    left to numpy. (tests/evaluation/test_row_sums.py holds numpy to this.)"""
    values = np.asarray(values)
    if values.ndim != 2 or values.dtype != np.float64 or not 0 < values.shape[1] < SHORT_ROW:
        return np.sum(values, axis=1)
    out = values[:, 0] + 0.0
    for j in range(1, values.shape[1]):
        out += values[:, j]
    return out


def strategy_proba(s: Strategy, recommended, behaviour_proba, q_values=None):
    """Target probabilities (n, K) of strategy ``s``; ``q_values`` (cross-fitted) is needed by override_gain."""
    if s.family == "partial_adoption":
        return partial_adoption_proba(recommended, behaviour_proba, s.parameter)
    if s.family == "incremental_odds":
        return incremental_proba(recommended, behaviour_proba, s.parameter)
    if q_values is None:
        raise UserInputError(
            "the override_gain strategies need the learned regime's cross-fitted Q-values; rerun the regime stage."
        )
    return override_proba(recommended, q_values, behaviour_proba, s.parameter)


def share_changed(target_proba, behaviour_proba) -> float:
    """Expected share of decisions at which the strategy's action differs from usual care's.

    The mean over decisions of the total-variation distance Σ_a max(0, π_e(a|s) − p̂_b(a|s)): the smallest
    probability of a change when the strategy's action is drawn as close to usual care's as possible (a maximal
    coupling; for the override strategy it is exactly the probability that the clinician's action is overridden).
    """
    return float(np.mean(changed_by_row(target_proba, behaviour_proba)))


def changed_by_row(target_proba, behaviour_proba) -> np.ndarray:
    """Per decision, Σ_a max(0, π_e(a|s) − p̂_b(a|s)) (the terms of :func:`share_changed`; a row's term depends on
    that row alone).

    ``target_proba`` may be a deterministic regime's action codes (m,): its one-hot row's only positive term is
    1 − p̂_b(its action|s), and adding zeros to it leaves it as it is (the same number, its row not built)."""
    if np.ndim(target_proba) == 1:  # a deterministic regime's codes: of its one-hot row, 1 − p̂_b(its action|s)
        behaviour = np.asarray(behaviour_proba, dtype=float)
        return 1.0 - behaviour[np.arange(behaviour.shape[0]), np.asarray(target_proba)]
    diff = np.asarray(target_proba, dtype=float) - np.asarray(behaviour_proba, dtype=float)
    return row_sums(np.clip(diff, 0.0, None))


def protocol_strategies(spec) -> list[Strategy]:
    """Every strategy of the protocol's ``strategies`` section, family by family, in grid order."""
    if spec is None:
        return []
    return [strategy(family, float(v)) for family in FAMILIES for v in getattr(spec, family)]


def headline_strategy(spec) -> Strategy | None:
    """The protocol's pre-specified headline strategy (``strategies.headline``), or None without a section."""
    if spec is None:
        return None
    wanted = (spec.headline.family, float(spec.headline.value))
    return next(s for s in protocol_strategies(spec) if (s.family, s.parameter) == wanted)
