"""How well the look-alike world reproduces the records: observed against simulated distributions of every state at
every decision point, usual care's action shares, episode lengths and the mean return; with the survival part,
events, losses to follow-up and survival at the horizon; and whether the rule the protocol's learner finds in a
simulated cohort acts like the one it finds in the records."""

from __future__ import annotations

import numpy as np
import pandas as pd

from regimewise.core.features import action_codes, level_values
from regimewise.describe.balance import SMD_FLAG, smd
from regimewise.protocol import Protocol
from regimewise.regime.learning import learn_regime
from regimewise.survival.curves import product_limit

# A learned rule whose agreement with usual care differs between the records and a simulated cohort by at least this
# much is pointed out (our threshold, no source): overlap-dependent results (ESS, support) then differ too.
AGREEMENT_FLAG = 0.10


def _columns(frame: pd.DataFrame, protocol: Protocol) -> dict[str, tuple[np.ndarray, bool]]:
    """Every state as numeric columns, each with whether it is 0/1: numeric states as they are, each level of a
    categorical as a 0/1 column."""
    out = {}
    for s in protocol.states:
        if s.kind == "categorical":
            text = level_values(frame, s.name, s.coded_levels)
            for level in s.coded_levels:
                out[f"{s.name}[{level}]"] = ((text == level).astype(float), True)
        else:
            out[s.name] = (frame[s.name].to_numpy(dtype=float), s.kind == "binary")
    return out


def episode_returns(frame: pd.DataFrame, discount: float) -> np.ndarray:
    """Each episode's discounted return, Σ γ^t r_t, in order of first appearance."""
    weighted = frame["reward"].to_numpy(dtype=float) * discount ** frame["step"].to_numpy(dtype=float)
    return pd.Series(weighted).groupby(frame["episode_id"].to_numpy(), sort=False).sum().to_numpy()


def reproduction(records: pd.DataFrame, simulated: pd.DataFrame, protocol: Protocol) -> dict:
    """Observed against simulated: states by decision point (means, SDs, standardised differences), action shares,
    decisions per episode and the mean return. ``flagged`` lists the (state, decision point) pairs whose absolute
    standardised difference is at least the describe stage's flag, 0.1 (common practice after Austin 2009)."""
    real_cols, sim_cols = _columns(records, protocol), _columns(simulated, protocol)
    real_step, sim_step = records["step"].to_numpy(), simulated["step"].to_numpy()
    states = []
    for name, (values, binary) in real_cols.items():
        for t in np.unique(real_step):
            real, sim = values[real_step == t], sim_cols[name][0][sim_step == t]
            states.append(
                {
                    "state": name,
                    "step": int(t),
                    "records_mean": float(real.mean()),
                    "simulated_mean": float(sim.mean()) if sim.size else None,
                    "records_sd": float(real.std(ddof=1)) if real.size > 1 else None,
                    "simulated_sd": float(sim.std(ddof=1)) if sim.size > 1 else None,
                    "smd": smd(sim, real, binary),  # simulated against records (Austin 2009)
                }
            )
    labels = protocol.action_labels
    shares = {
        which: {a: float(np.mean(frame["action"].to_numpy() == a)) for a in labels}
        for which, frame in (("records", records), ("simulated", simulated))
    }
    real_return, sim_return = episode_returns(records, protocol.discount), episode_returns(simulated, protocol.discount)
    flagged = [
        {"state": s["state"], "step": s["step"], "smd": s["smd"]}
        for s in states
        if s["smd"] is not None and abs(s["smd"]) >= SMD_FLAG
    ]
    return {
        "states": states,
        "flagged": flagged,
        "smd_flag": SMD_FLAG,
        "largest_smd": max((abs(s["smd"]) for s in states if s["smd"] is not None), default=None),
        "action_shares": shares,
        "decisions_per_episode": {
            "records": float(len(records) / records["episode_id"].nunique()),
            "simulated": float(len(simulated) / simulated["episode_id"].nunique()),
        },
        "mean_return": {
            "records": float(real_return.mean()),
            "records_se": float(real_return.std(ddof=1) / np.sqrt(real_return.size)),
            "simulated": float(sim_return.mean()),
            "simulated_se": float(sim_return.std(ddof=1) / np.sqrt(sim_return.size)),
        },
    }


def _rule_summary(frame: pd.DataFrame, protocol: Protocol) -> dict:
    regime = learn_regime(frame, protocol)
    taken = action_codes(frame, protocol.action_labels)
    recommended = regime.recommend(frame)
    counts = np.bincount(recommended, minlength=len(protocol.action_labels)) / len(recommended)
    return {
        "agreement": float(np.mean(recommended == taken)),
        "recommended_shares": {a: float(c) for a, c in zip(protocol.action_labels, counts)},
    }


def learned_rules(records: pd.DataFrame, simulated: pd.DataFrame, protocol: Protocol) -> dict | None:
    """The rule the protocol's learner finds in the records and in one simulated cohort (each fitted on all its
    decisions, without cross-fitting): the share of decisions where it recommends the action usual care took, and
    its recommended actions' shares; ``flagged`` when the agreements differ by at least :data:`AGREEMENT_FLAG`
    (then the look-alike cohorts' overlap, ESS and support verdicts differ from the records'). None when the
    protocol learns no regime."""
    if not protocol.analysis.learn_regime:
        return None
    out = {"records": _rule_summary(records, protocol), "simulated": _rule_summary(simulated, protocol)}
    gap = out["simulated"]["agreement"] - out["records"]["agreement"]
    return out | {"agreement_difference": gap, "flag": AGREEMENT_FLAG, "flagged": bool(abs(gap) >= AGREEMENT_FLAG)}


def _follow_up_figures(episodes: pd.DataFrame, horizon: float) -> dict:
    """Share of episodes with an event by the horizon, share lost to follow-up before it (no event, follow-up
    shorter than the horizon), and the Kaplan–Meier survival at the horizon (the pipeline's product-limit
    estimator, follow-up cut at the horizon)."""
    follow = episodes["followup_days"].to_numpy(dtype=float)
    event = (episodes["event"].to_numpy(dtype=float) == 1) & (follow <= horizon)
    stop = np.minimum(follow, horizon)
    times, survival = product_limit(np.zeros(stop.size), stop, event, np.ones(stop.size))
    return {
        "event_share": float(event.mean()),
        "dropout_share": float(np.mean(~event & (follow < horizon))),
        "survival_at_horizon": float(survival[times <= horizon][-1]) if np.any(times <= horizon) else 1.0,
    }


def follow_up_reproduction(records: pd.DataFrame, simulated: pd.DataFrame, horizon: float) -> dict:
    """The records' episodes table against a simulated cohort's: events, losses and survival at the horizon."""
    return {
        "horizon_days": float(horizon),
        "records": _follow_up_figures(records, horizon),
        "simulated": _follow_up_figures(simulated, horizon),
    }
