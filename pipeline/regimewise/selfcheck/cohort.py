"""One simulated cohort of the self-check: simulate it from the look-alike world, rerun the analysis on it, and
compute the truths of what that analysis estimated.

The analysis is the one every bootstrap replicate and the evaluate stage run (:func:`learn_and_evaluate`: usual
care, the cross-fitted regime, every estimator and verdict), with the protocol's bootstrap at the self-check's
number of replicates (:func:`run_shard`, :func:`combine`). The truths are the data-adaptive targets that the
cross-fitted estimates aim at: for the learned regime and the headline strategy, the episode-weighted mean over
the cross-fitting folds of the true value of the rule learned without that fold, in the look-alike world, by Monte
Carlo with common random numbers (a truth defined for another rule would make valid estimators look biased; Shaw
et al. 2025).

With a hidden confounder in the world (Γ > 1, :meth:`LookAlikeWorld.with_confounder`), each cohort also gets the
sensitivity analysis the sensitivity stage runs (:func:`regimewise.bootstrap.replicates.target_curve` on the
cohort, the bootstrap replicates' curves of the same shard, :func:`summarise_sensitivity`): the point bounds of the
sensitivity target's contrast with usual care, and their percentile-bootstrap interval (Zhao, Small & Bhattacharya
2019), at the world's Γ and at Γ = 1, beside the target's true contrast. Research use only.
"""

from __future__ import annotations

import numpy as np

from regimewise.bootstrap.intervals import combine
from regimewise.bootstrap.replicates import learn_and_evaluate, run_shard
from regimewise.core.seeds import stream
from regimewise.demo.strategies import IncrementalOdds, OverrideGain, PartialAdoption
from regimewise.evaluation.strategies import protocol_strategies
from regimewise.protocol import Protocol
from regimewise.regime.learning import crossfit_folds, fold_regimes, learn_regime
from regimewise.selfcheck.world import LookAlikeWorld
from regimewise.sensitivity.analysis import sensitivity_target, summarise_sensitivity

USUAL_CARE, LEARNED = "usual_care", "learned"
MESSAGE_LENGTH = 300  # characters of a failed cohort's error message kept in selfcheck.json


def cohort_seeds(protocol: Protocol, cohort: int) -> tuple[int, int]:
    """The seeds of simulated cohort ``cohort``: its records, and the common random numbers of its truths."""
    records, truths = stream(protocol.seed, "selfcheck", cohort).generate_state(2)
    return int(records), int(truths)


def headline_strategy(protocol: Protocol):
    """The protocol's headline strategy (None without a strategies section)."""
    if protocol.strategies is None:
        return None
    h = protocol.strategies.headline
    return next(s for s in protocol_strategies(protocol.strategies) if (s.family, s.parameter) == (h.family, h.value))


def strategy_policy(strategy, learned):
    """A strategy built from one learned regime, acting on usual care's natural action (for its truth)."""
    if strategy.family == "partial_adoption":
        return PartialAdoption(learned, strategy.parameter)
    if strategy.family == "override_gain":
        return OverrideGain(learned, learned.q_values, strategy.parameter)
    return IncrementalOdds(learned, strategy.parameter)


def compared_protocol(protocol: Protocol, replicates: int, confounder_gamma: float = 1.0) -> Protocol:
    """The protocol as the self-check runs it: usual care, the learned regime and the headline strategy only (no
    other strategy of the grids, no fixed strategies, no comparators), ``replicates`` replicates in one shard; with
    a hidden confounder (``confounder_gamma`` > 1) its Γ joins the sensitivity table's Γ values, so the bounds and
    every replicate's curve are computed at it."""
    evaluation = protocol.evaluation.model_copy(
        update={"replicates": replicates, "shards": 1, "fixed_strategies": False}
    )
    update = {"evaluation": evaluation, "comparators": []}
    if confounder_gamma > 1.0:
        gammas = sorted({1.0, float(confounder_gamma), *protocol.sensitivity.gammas})
        update["sensitivity"] = protocol.sensitivity.model_copy(update={"gammas": gammas})
    s = protocol.strategies
    if s is not None:
        h = s.headline
        families = ("partial_adoption", "override_gain", "incremental_odds")
        grids = {f: ([h.value] if f == h.family else []) for f in families}
        update["strategies"] = s.model_copy(update=grids)
    return protocol.model_copy(update=update)


def _truths(world, decisions, protocol, n, seed):
    """{name: true value} of usual care, the learned regime and the headline strategy, and their contrasts with
    usual care (the same draws for every policy)."""
    usual = world.returns(USUAL_CARE, n, seed)
    out = {USUAL_CARE: {"value": float(usual.mean()), "contrast": 0.0}}
    if not protocol.analysis.learn_regime:
        return out
    folds = crossfit_folds(decisions, protocol)
    if folds is None:
        pairs = [(np.ones(len(decisions), dtype=bool), learn_regime(decisions, protocol))]
    else:
        pairs = fold_regimes(decisions, protocol, folds)
    first = decisions["step"].to_numpy() == 0
    shares = [float(np.sum(rows & first) / np.sum(first)) for rows, _ in pairs]
    policies = {LEARNED: lambda learned: learned}
    strategy = headline_strategy(protocol)
    if strategy is not None:
        policies[strategy.name] = lambda learned: strategy_policy(strategy, learned)
    for name, make in policies.items():
        value = contrast = 0.0
        for (_, learned), share in zip(pairs, shares):
            returns = world.returns(make(learned), n, seed)
            value += share * float(returns.mean())
            contrast += share * float((returns - usual).mean())
        out[name] = {"value": value, "contrast": contrast}
    return out


def _estimates(values, intervals, names):
    """{name: {estimator: estimate, verdict, ESS, interval, bootstrap SE, contrast with usual care, its interval
    and SE}}."""
    contrasts = {(c["regime"], c["estimator"]): c for c in intervals["contrasts"] if c["versus"] == USUAL_CARE}
    out = {}
    for regime in values["regimes"]:
        if regime["name"] not in names:
            continue
        out[regime["name"]] = {}
        for est, e in regime["estimates"].items():
            v = intervals["values"][regime["name"]][est]
            c = contrasts.get((regime["name"], est))
            out[regime["name"]][est] = {
                "value": e["value"],
                "verdict": e["verdict"],
                "ess": e["ess"],
                "value_interval": [v["low"], v["high"]],
                "value_se": v.get("bootstrap_se"),
                "contrast": None if c is None else c["difference"],
                "contrast_interval": None if c is None else [c["low"], c["high"]],
                "contrast_se": None if c is None else c.get("bootstrap_se"),
            }
    return out


def _confounding(curve, shard, protocol, gamma, truths) -> dict:
    """The sensitivity analysis of one cohort at the world's Γ and at Γ = 1 (:func:`summarise_sensitivity` on the
    cohort's curve and its replicates' curves): the target, its true contrast with usual care, and per Γ the point
    bounds of the contrast and their bootstrap interval."""
    target = sensitivity_target(protocol)
    replicates = [r["sensitivity"] for r in shard["replicates"] if "sensitivity" in r]
    table = summarise_sensitivity(curve, replicates, protocol, None, target)["table"]
    rows = {row["gamma"]: row for row in table}

    def at(g):
        row = rows[g]
        return {
            "gamma": g,
            "bounds": [row["contrast_lower"], row["contrast_upper"]],
            "interval": [row["low"], row["high"]],
        }

    return {
        "gamma": gamma,
        "strategy": target["name"],
        "strategy_words": target["words"],
        "true_contrast": truths[target["name"]]["contrast"],
        "replicates_used": len(replicates),
        "at_gamma": at(gamma),
        "at_one": at(1.0),
    }


def run_cohort(world: LookAlikeWorld, protocol: Protocol, cohort: int, replicates: int, truth_episodes: int) -> dict:
    """Simulate cohort ``cohort`` (as many episodes as the records), rerun the analysis with ``replicates``
    bootstrap replicates, and compute the truths on ``truth_episodes`` simulated episodes per policy; with a hidden
    confounder in the world, also the sensitivity bounds at its Γ (:func:`_confounding`)."""
    gamma = world.confounder_gamma
    p = compared_protocol(protocol, replicates, gamma)
    records_seed, truth_seed = cohort_seeds(protocol, cohort)
    decisions, _ = world.simulate(world.n_episodes, records_seed)
    values, curve = learn_and_evaluate(decisions, p, strict=False, target=True)
    shard = run_shard(decisions, p, 0)
    intervals = combine(values, [shard], p)
    truths = _truths(world, decisions, p, truth_episodes, truth_seed)
    extra = {}
    if gamma > 1.0:
        extra["confounding"] = _confounding(curve, shard, p, gamma, truths)
    return {
        "cohort": cohort,
        "seed": records_seed,
        "episodes": world.n_episodes,
        "replicates": replicates,
        "replicates_used": intervals["replicates_used"],
        "truth_episodes": truth_episodes,
        "mean_return": float(decisions.groupby("episode_id", sort=False)["reward"].sum().mean()),
        "truths": truths,
        "estimates": _estimates(values, intervals, set(truths)),
        **extra,
    }


def cohort_outcome(
    world: LookAlikeWorld, protocol: Protocol, cohort: int, replicates: int, truth_episodes: int
) -> dict:
    """:func:`run_cohort`, with a failure of the analysis on this simulated cohort recorded instead of raised: the
    cohort's entry then holds ``failed`` (the error's kind and first line) and no estimates, and the summary leaves
    it out and counts it. Out of memory is still raised (it says nothing about the records)."""
    try:
        return run_cohort(world, protocol, cohort, replicates, truth_episodes)
    except MemoryError:
        raise
    except Exception as err:  # any failure of the analysis on one cohort is a finding to report
        message = (str(err).strip().splitlines() or [""])[0][:MESSAGE_LENGTH]
        return {
            "cohort": cohort,
            "seed": cohort_seeds(protocol, cohort)[0],
            "episodes": world.n_episodes,
            "failed": f"{type(err).__name__}: {message}" if message else type(err).__name__,
        }
