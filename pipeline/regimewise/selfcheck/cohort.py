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

With a ``survival`` section (and a world that models follow-up), the cohort comes with an episodes table and the
survival stage's own analysis runs on it (:func:`survival_analysis`, clone–censor–weight with the dropout weights),
its intervals from the survival values of the same bootstrap replicates (:func:`survival_intervals`), as the
workflow forms them. The truths are each compared strategy's survival at the protocol's table times and its risk
difference from usual care, with loss to follow-up switched off (survival had nobody been lost: the estimand the
dropout weights target), by Monte Carlo with the same draws for every policy and the same fold shares as the
values; with a grace period of g decision points, of each strategy after usual care's first g decisions (as the
analysis defines it). Research use only.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from regimewise.bootstrap.intervals import combine
from regimewise.bootstrap.replicates import HeldRegime, fit_replicate, run_shard, target_curve
from regimewise.core.seeds import stream
from regimewise.demo.strategies import IncrementalOdds, OverrideGain, PartialAdoption
from regimewise.evaluation.strategies import protocol_strategies
from regimewise.evaluation.values import evaluate_all
from regimewise.protocol import Protocol
from regimewise.regime.learning import crossfit_folds, fold_regimes, learn_regime
from regimewise.selfcheck.world import LookAlikeWorld
from regimewise.sensitivity.analysis import sensitivity_target, summarise_sensitivity
from regimewise.survival.analysis import survival_analysis, survival_intervals, table_times

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
    other strategy of the grids, no fixed strategies, no comparators, no Cox model), ``replicates`` replicates in
    one shard; with a hidden confounder (``confounder_gamma`` > 1) its Γ joins the sensitivity table's Γ values, so
    the bounds and every replicate's curve are computed at it."""
    evaluation = protocol.evaluation.model_copy(
        update={"replicates": replicates, "shards": 1, "fixed_strategies": False}
    )
    update = {"evaluation": evaluation, "comparators": []}
    if confounder_gamma > 1.0:
        gammas = sorted({1.0, float(confounder_gamma), *protocol.sensitivity.gammas})
        update["sensitivity"] = protocol.sensitivity.model_copy(update={"gammas": gammas})
    if protocol.survival is not None:
        update["survival"] = protocol.survival.model_copy(update={"cox": False})
    s = protocol.strategies
    if s is not None:
        h = s.headline
        families = ("partial_adoption", "override_gain", "incremental_odds")
        grids = {f: ([h.value] if f == h.family else []) for f in families}
        update["strategies"] = s.model_copy(update=grids)
    return protocol.model_copy(update=update)


@dataclass(frozen=True)
class AfterGrace:
    """``policy`` from decision point ``grace`` on, usual care's natural action before: the strategy the survival
    analysis estimates with a grace period (:mod:`regimewise.survival.clones`)."""

    policy: object
    grace: int

    def modify(self, frame, natural, proba, coins):
        if hasattr(self.policy, "modify"):
            codes = self.policy.modify(frame, natural, proba, coins)
        else:
            codes = self.policy(frame)
        return np.where(frame["step"].to_numpy() < self.grace, natural, codes)


def _policy_truths(world, n, seed, times, grace=0):
    """A function of a policy giving its returns and, with ``times``, its true survival at them without loss to
    follow-up (else None); every policy gets the same draws. With a grace period the survival is that of the policy
    after the grace period (a second run), the returns those of the policy itself."""

    def run(policy):
        if times is None:
            return world.returns(policy, n, seed), None
        returns, event_days = world.returns_and_event_days(policy, n, seed)
        if grace > 0 and not (isinstance(policy, str) and policy == USUAL_CARE):
            event_days = world.returns_and_event_days(AfterGrace(policy, grace), n, seed)[1]
        return returns, np.array([float(np.mean(event_days > t)) for t in times])

    return run


def _truths(world, decisions, protocol, n, seed):
    """{name: true value} of usual care, the learned regime and the headline strategy, and their contrasts with
    usual care (the same draws for every policy); with survival, also the true survival at the table times and the
    risk difference from usual care there."""
    times = table_times(protocol) if has_survival(world, protocol) else None
    run = _policy_truths(world, n, seed, times, 0 if times is None else protocol.survival.grace)
    usual, usual_survival = run(USUAL_CARE)
    out = {USUAL_CARE: {"value": float(usual.mean()), "contrast": 0.0}}
    if times is not None:
        out[USUAL_CARE].update(survival=usual_survival.tolist(), risk_difference=[0.0] * len(times))
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
        survival = risk_difference = 0.0
        for (_, learned), share in zip(pairs, shares):
            returns, policy_survival = run(make(learned))
            value += share * float(returns.mean())
            contrast += share * float((returns - usual).mean())
            if times is not None:  # risk difference = (1 − S_π) − (1 − S_usual care)
                survival = survival + share * policy_survival
                risk_difference = risk_difference + share * (usual_survival - policy_survival)
        out[name] = {"value": value, "contrast": contrast}
        if times is not None:
            out[name].update(survival=survival.tolist(), risk_difference=risk_difference.tolist())
    return out


def has_survival(world: LookAlikeWorld, protocol: Protocol) -> bool:
    """Whether the self-check checks survival: a survival section and a world that models follow-up."""
    return protocol.survival is not None and world.follow_up is not None


def _bootstrap_se(draws):
    defined = np.asarray([d for d in draws if d is not None], dtype=float)
    return float(np.std(defined, ddof=1)) if defined.size >= 2 else None


def _survival_estimates(point, limits, replicates, names):
    """{name: {survival, risk_difference: per table time; each with its interval (low and high lists) and
    bootstrap SE (the SD of the replicates, as the values' bootstrap SE); reliable: whether the strategy's
    effective sample stays above the analysis's floor up to the horizon}} of the survival analysis."""
    out = {}
    for row in point["strategies"]:
        name = row["name"]
        if name not in names:
            continue
        out[name] = {"reliable": row["diagnostics"]["unreliable_from"] is None}
        for key in ("survival", "risk_difference"):
            estimate = row["at_times"][key]
            bounds = limits["strategies"][name][key] or {"low": [None] * len(estimate), "high": [None] * len(estimate)}
            draws = [r[name][key] for r in replicates if name in r]
            out[name][key] = estimate
            out[name][f"{key}_interval"] = [bounds["low"], bounds["high"]]
            out[name][f"{key}_se"] = [_bootstrap_se([d[i] for d in draws]) for i in range(len(estimate))]
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
    decisions, episodes, _ = world.simulate_records(world.n_episodes, records_seed)
    survival = has_survival(world, p)
    # as bootstrap.replicates.learn_and_evaluate, keeping the fit for the survival analysis, the held regime and
    # the sensitivity target's curve
    proba, recommended, q, folds = fit_replicate(decisions, p)
    values = evaluate_all(decisions, proba, recommended, p, strict=False, learned_folds=folds, learned_q=q)
    held = None if recommended is None else HeldRegime(recommended, q, folds)
    shard = run_shard(decisions, p, 0, episodes=episodes if survival else None, held=held)
    intervals = combine(values, [shard], p)
    truths = _truths(world, decisions, p, truth_episodes, truth_seed)
    out = {
        "cohort": cohort,
        "seed": records_seed,
        "episodes": world.n_episodes,
        "replicates": replicates,
        "replicates_used": intervals["replicates_used"],
        "truth_episodes": truth_episodes,
        "mean_return": float(decisions.groupby("episode_id", sort=False)["reward"].sum().mean()),
        "truths": truths,
        "estimates": _estimates(values, intervals, set(truths)),
    }
    if survival:  # the survival stage's analysis, its intervals from the same replicates
        point = survival_analysis(decisions, episodes, proba, recommended, p, q)
        replicates_survival = [r["survival"] for r in shard["replicates"] if "survival" in r]
        limits = survival_intervals(point, replicates_survival, p)
        out["survival"] = {
            "times": point["times"],
            "horizon_days": point["horizon_days"],
            "events": int(episodes["event"].sum()),
            "estimates": _survival_estimates(point, limits, replicates_survival, set(truths)),
        }
    if gamma > 1.0:
        curve = target_curve(decisions, proba, recommended, p)
        out["confounding"] = _confounding(curve, shard, p, gamma, truths)
    return out


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
