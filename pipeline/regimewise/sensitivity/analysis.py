"""Sensitivity of a regime's value to unmeasured confounding.

Marginal sensitivity model (Tan 2006): a hidden factor may change the odds that usual care took the action it
took by at most a factor Γ ≥ 1. With estimated probability e of the action taken, the true inverse probability
lies in ``[1 + (1/e − 1)/Γ, 1 + Γ(1/e − 1)]``. For a regime's trajectory weight the per-decision bounds multiply
over the decisions allowed to be confounded; decisions outside that set keep their estimated weight.

The self-normalised (weighted) importance-sampling value Σ W_i G_i / Σ W_i is then bounded by a linear-fractional
program over the box W_i ∈ [A_i, B_i]. Its optimum puts the upper weight on the episodes with the largest
returns and the lower weight on the rest, for one threshold found by sorting (Zhao, Small & Bhattacharya 2019,
JRSS-B 81:735, Proposition 2 and its algorithm). Dorn & Guo (2022, JASA) give sharper bounds that also use the
outcome model; they are not implemented here.

E-values follow VanderWeele & Ding (2017, Ann Intern Med 167:268).

References
----------
Tan, Z. (2006). A distributional approach for causal inference using propensity scores. JASA 101:1619.
Zhao, Q., Small, D. S. & Bhattacharya, B. B. (2019). Sensitivity analysis for inverse probability weighting
estimators via the percentile bootstrap. JRSS-B 81:735-761.
Namkoong, H., Keramati, R., Yadlowsky, S. & Brunskill, E. (2020). Off-policy policy evaluation for sequential
decisions under unobserved confounding. NeurIPS.
VanderWeele, T. J. & Ding, P. (2017). Sensitivity analysis in observational research: introducing the E-value.
Ann Intern Med 167:268-274.
"""

from __future__ import annotations

import warnings

import numpy as np

from regimewise.core.arrays import finite_or_none
from regimewise.core.features import action_codes, episode_codes
from regimewise.core.quantiles import bootstrap_quantile
from regimewise.core.weighting import kish_ess
from regimewise.estimators import ESTIMATORS
from regimewise.evaluation.strategies import headline_strategy
from regimewise.evaluation.values import (
    headline_estimator,
    named_strategy_codes,
    named_strategy_label,
    named_strategy_words,
)
from regimewise.sensitivity.bounds import analysis_gammas, bounds_curve, tipping_point
from regimewise.sensitivity.evalues import (
    e_value,
    e_value_interval,
    mean_difference_to_risk_ratio,
)


# ---------------------------------------------------------------------------------------------- on the records
def confounded_mask(step: np.ndarray, spec) -> np.ndarray:
    """Decisions at which the protocol lets a hidden confounder act (all, the first, or listed steps)."""
    if spec.confounded_decisions == "all":
        return np.ones(step.shape, dtype=bool)
    if spec.confounded_decisions == "first":
        return step == 0
    return np.isin(step, spec.confounded_decisions)


def sensitivity_target(protocol) -> dict:
    """The regime the confounding bounds are about: the pre-specified headline strategy when it is a partial
    adoption of the learned regime (its weight at a decision, 1 − ε + ε·1[follows]/e, rises with 1/e, so the
    marginal sensitivity model bounds it decision by decision), else the learned regime (ε = 1).

    The override and incremental strategies' weights also depend on the probabilities of actions not taken,
    which the model does not bound; with one of them as headline the bounds stay on the learned regime, and
    ``note`` says so.

    With ``analysis.learn_regime: false`` the bounds are on the headline named strategy (``always_<action>`` or a
    comparator): a deterministic regime, whose trajectory weight the model bounds as the learned regime's."""
    if protocol.headline_regime is not None:
        name = protocol.headline_regime
        return {"name": name, "words": named_strategy_words(protocol, name), "adoption": 1.0, "note": None}
    chosen = headline_strategy(protocol.strategies)
    if chosen is not None and chosen.family == "partial_adoption":
        words = f"the learned regime followed at {100 * chosen.parameter:g}% of reviews (usual care at the others)"
        return {"name": chosen.name, "words": words, "adoption": chosen.parameter, "note": None}
    note = None
    if chosen is not None:
        note = (
            f"The bounds are for the learned regime, not the headline strategy ({chosen.label}): that strategy's "
            "weights also depend on usual care's probabilities of actions not taken, which the sensitivity model "
            "does not bound."
        )
    return {"name": "learned", "words": "the learned regime", "adoption": 1.0, "note": note}


def bounded_actions(decisions, protocol, recommended) -> np.ndarray:
    """Action codes of the deterministic regime the bounds are about: the learned regime's ``recommended``, or,
    with no regime learned, the headline named strategy's actions at ``decisions``."""
    if protocol.headline_regime is None:
        return recommended
    return named_strategy_codes(decisions, protocol, protocol.headline_regime)


def bounded_comparators(protocol) -> tuple[str, ...]:
    """The comparators bounded beside the main target: every comparator of the protocol but the one the main
    bounds are already about (the headline named strategy of a study that learns no regime). A comparator is a
    deterministic regime, so the marginal sensitivity model bounds its trajectory weight as the learned regime's."""
    return tuple(c.name for c in protocol.comparators if c.name != protocol.headline_regime)


def comparator_curves(decisions, behaviour_proba, protocol) -> dict:
    """Each comparator of :func:`bounded_comparators`: its bounds curve over the Γ grid (:func:`regime_curve`)."""
    return {
        name: regime_curve(decisions, behaviour_proba, named_strategy_codes(decisions, protocol, name), protocol)
        for name in bounded_comparators(protocol)
    }


def comparator_sensitivity(points: dict, replicates: list[dict], protocol, intervals: dict) -> list[dict]:
    """Per comparator: the bounds of its value and of its contrast with usual care at the protocol's Γ values,
    the bootstrap intervals of the bounds and its tipping point Γ*, summarised as for the main target
    (:func:`summarise_sensitivity`, without the full curve). ``replicates`` are the shards' sensitivity entries,
    each holding its comparators' curves under ``comparators``; ``intervals`` the bootstrap's intervals.json."""
    out = []
    for name, point in points.items():
        reps = [
            {"bounded": r["comparators"][name], "usual_care": r["usual_care"]}
            for r in replicates
            if name in r.get("comparators", {})
        ]
        target = {"name": name, "words": named_strategy_words(protocol, name), "adoption": 1.0, "note": None}
        contrast = next(
            (
                c
                for c in intervals.get("contrasts", [])
                if (c["regime"], c["versus"], c["estimator"]) == (name, "usual_care", headline_estimator(protocol))
            ),
            None,
        )
        full = summarise_sensitivity(point, reps, protocol, contrast, target)
        keep = ("strategy", "strategy_words", "ess", "low_ess", "replicates_used", "table", "tipping_point")
        out.append(
            {key: full[key] for key in keep}
            | {"tipping_point_bounds": full["tipping_point_bounds"], "e_values": full["e_values"]}
            | {"label": named_strategy_label(protocol, name), "sentence": full["sentence"]}
        )
    return out


def regime_curve(decisions, behaviour_proba, recommended, protocol, gammas=None, adoption=1.0) -> dict:
    """Bounds of the learned regime's (or, with ``adoption`` ε < 1, its partial adoption's) weighted-IS value
    over the Γ grid, and usual care's observed mean return.

    Usual care's value is the observed mean return, which hidden confounding of the choices cannot change;
    so the contrast's bounds are the regime's bounds minus that mean. ``gammas`` defaults to the protocol's
    analysis grid (:func:`analysis_gammas`).
    """

    spec = protocol.sensitivity
    codes = action_codes(decisions, protocol.action_labels)
    episode = episode_codes(decisions)
    step = decisions["step"].to_numpy(dtype=np.int64)
    reward = decisions["reward"].to_numpy(dtype=float) * protocol.discount**step
    returns = np.bincount(episode, weights=reward, minlength=int(episode.max()) + 1)
    curve = bounds_curve(
        returns,
        behaviour_proba[np.arange(len(codes)), codes],
        np.asarray(recommended) == codes,
        episode,
        analysis_gammas(spec) if gammas is None else np.asarray(gammas, dtype=float),
        confounded_mask(step, spec),
        adoption,
    )
    follows = np.asarray(recommended) == codes
    factor = 1.0 - adoption + adoption * follows / behaviour_proba[np.arange(len(codes)), codes]
    with np.errstate(divide="ignore"):
        weights = np.exp(np.bincount(episode, weights=np.log(factor), minlength=returns.size))
    ess = kish_ess(weights) if weights.any() else 0.0
    return {
        "bounded": curve,
        "usual_care": float(returns.mean()),
        "returns_sd": float(returns.std(ddof=1)),
        "ess": ess,
        "n_episodes": int(returns.size),
    }


def _interval_limits(contrast, replicates, level) -> np.ndarray:
    """Per Γ: the α/2 quantile of the replicates' lower bounds and the 1 − α/2 quantile of their upper bounds."""
    if not replicates:
        return np.full_like(contrast, np.nan)
    reps = np.stack([np.asarray(r["bounded"], dtype=float) - r["usual_care"] for r in replicates])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        low = bootstrap_quantile(reps[:, :, 0], (1 - level) / 2, axis=0)
        high = bootstrap_quantile(reps[:, :, 1], 1 - (1 - level) / 2, axis=0)
    return np.column_stack([low, high])


def _grid_tipping(edge, gammas, spec):
    """The tipping point of a curve given on the Γ grid (None when any point is undefined)."""
    if not np.all(np.isfinite(edge)):
        return None

    def edge_at(gamma):
        return edge[min(int(np.searchsorted(gammas, gamma - 1e-12)), len(gammas) - 1)]

    return tipping_point(edge_at, spec.gamma_max, spec.precision)


def summarise_sensitivity(
    point: dict, replicates: list[dict], protocol, headline: dict | None, target: dict | None = None
) -> dict:
    """Point bounds, percentile-bootstrap intervals of the bounds, tipping point and E-values.

    The interval at Γ is [α/2 quantile of the replicates' lower bounds, 1 − α/2 quantile of their upper bounds]
    (Zhao, Small & Bhattacharya 2019, percentile bootstrap). The tipping point Γ* is the smallest Γ whose interval
    for the contrast includes zero.
    """
    spec, level = protocol.sensitivity, protocol.evaluation.interval_level
    gammas = analysis_gammas(spec)
    contrast = point["bounded"] - point["usual_care"]
    limits = _interval_limits(contrast, replicates, level)
    benefit = contrast[0, 0]
    sign = 1.0 if not np.isfinite(benefit) or benefit >= 0 else -1.0
    star = _grid_tipping(limits[:, 0] if sign > 0 else -limits[:, 1], gammas, spec)
    bounds_star = _grid_tipping(contrast[:, 0] if sign > 0 else -contrast[:, 1], gammas, spec)
    shown = [int(np.searchsorted(gammas, g)) for g in spec.gammas]
    floor = max(protocol.evaluation.minimum_ess, protocol.evaluation.minimum_ess_fraction * point["n_episodes"])
    target = target or {"name": "learned", "words": "the learned regime", "adoption": 1.0, "note": None}
    return {
        "strategy": target["name"],
        "strategy_words": target["words"],
        "adoption": target["adoption"],
        "note": target["note"],
        "estimator": "wis",
        "estimator_words": ESTIMATORS["wis"].words,
        "ess": point["ess"],
        "low_ess": bool(point["ess"] < floor),
        "confounded_decisions": spec.confounded_decisions,
        "level": level,
        "replicates_used": len(replicates),
        "usual_care_mean_return": point["usual_care"],
        "table": [
            {
                "gamma": float(gammas[i]),
                "value_lower": finite_or_none(point["bounded"][i, 0]),
                "value_upper": finite_or_none(point["bounded"][i, 1]),
                "contrast_lower": finite_or_none(contrast[i, 0]),
                "contrast_upper": finite_or_none(contrast[i, 1]),
                "low": finite_or_none(limits[i, 0]),
                "high": finite_or_none(limits[i, 1]),
            }
            for i in shown
        ],
        "curve": {
            "gamma": gammas.tolist(),
            "low": limits[:, 0].tolist(),
            "high": limits[:, 1].tolist(),
            "contrast_lower": contrast[:, 0].tolist(),
            "contrast_upper": contrast[:, 1].tolist(),
        },
        "tipping_point": star,
        "tipping_point_bounds": bounds_star,
        "gamma_max": spec.gamma_max,
        "precision": spec.precision,
        "e_values": headline_e_values(headline, point["returns_sd"]),
        "sentence": tipping_sentence(star, spec.gamma_max, benefit, target["words"])
        + bounds_sentence(star, bounds_star, spec.gamma_max)
        if replicates
        else ("Without bootstrap replicates the bounds have no interval, so no tipping point is computed."),
    }


def headline_e_values(headline: dict | None, returns_sd: float) -> dict | None:
    """E-values of the headline contrast and of its interval limit nearest zero (mean difference -> RR)."""
    if headline is None or headline.get("difference") is None or headline.get("low") is None:
        return None
    convert = lambda d: mean_difference_to_risk_ratio(d, returns_sd)  # noqa: E731
    low, high = headline["low"], headline["high"]
    return {
        "estimator": headline["estimator"],
        "difference": headline["difference"],
        "risk_ratio": convert(headline["difference"]),
        "e_value": e_value(convert(headline["difference"])),
        "e_value_interval": e_value_interval(convert(low), convert(high)),
        "conversion": "risk ratio ≈ exp(0.91 × difference / SD of returns): Chinn's (2000) log odds ratio of 1.81 per "
        "standard deviation, halved by the square-root conversion of an odds ratio for a common outcome "
        "(VanderWeele & Ding 2017)",
    }


def tipping_sentence(star, gamma_max, benefit, words: str = "the learned regime") -> str:
    """One plain sentence saying what the tipping point means for the strategy described by ``words``."""
    if not np.isfinite(benefit):
        return f"No episode follows {words} throughout, so its weighted value and its bounds are undefined."
    difference = f"the difference between {words} and usual care"
    if star == 1.0:
        return (
            f"Even without hidden confounding (Γ = 1) the interval for {difference} includes zero, so there is no "
            "benefit for a hidden confounder to erase."
        )
    if star is None:
        return (
            f"Up to Γ = {gamma_max:g} the interval for the difference excludes zero: a hidden factor would have to "
            f"change the odds of clinicians' choices by more than {gamma_max:g}-fold to erase it."
        )
    return (
        f"A hidden factor that changed the odds of the action clinicians took by a factor of {star:.2f} "
        f"(in either direction, at every confounded decision) would be enough to make the interval for {difference} "
        "include zero."
    )


def bounds_sentence(star, bounds_star, gamma_max) -> str:
    """Where the bounds themselves (no sampling error) reach zero, when that differs from the interval's Γ*."""
    if bounds_star == star:
        return ""
    where = f"Γ = {bounds_star:.2f}" if bounds_star is not None else f"no Γ up to {gamma_max:g}"
    return (
        f" The bounds themselves, ignoring sampling error, reach zero at {where}; Γ* uses the interval, which also "
        "counts the uncertainty of the estimate."
    )
