"""Combining bootstrap replicates into intervals: percentile, basic and m-out-of-n limits for every value and
contrast, with the project's quantile rule, and the estimators whose intervals disagree.
"""

from __future__ import annotations

import math

import numpy as np

from regimewise.core.quantiles import bootstrap_quantile
from regimewise.errors import UserInputError
from regimewise.estimators import ESTIMATORS
from regimewise.evaluation.values import point_values
from regimewise.evaluation.verdicts import NOT_IDENTIFIED, SUPPORTED, worst
from regimewise.protocol.model import Protocol


# ---------------------------------------------------------------------------------------------- combine
def collect_replicates(shards: list[dict], n_replicates: int) -> tuple[list[dict], list[dict]]:
    """(successful, failed) replicates in replicate order; refuse missing or repeated replicates."""
    found = sorted((r for s in shards for r in s["replicates"]), key=lambda r: r["replicate"])
    numbers = [r["replicate"] for r in found]
    if numbers != list(range(n_replicates)):
        raise UserInputError(
            f"bootstrap shards hold replicates {numbers[:3]}… ({len(numbers)}) instead of 0..{n_replicates - 1}; "
            "rerun the bootstrap rules after changing evaluation.replicates or evaluation.shards."
        )
    return [r for r in found if "values" in r], [r for r in found if "error" in r]


def percentile_interval(draws: np.ndarray, level: float) -> tuple[float, float]:
    """Percentile interval: the (1 − level)/2 and (1 + level)/2 quantiles of the bootstrap draws."""
    low, high = bootstrap_quantile(draws, [(1 - level) / 2, (1 + level) / 2])
    return float(low), float(high)


def interval(estimate, draws, level, scale, basic=False):
    """Percentile interval, or θ̂ − s(q* − θ̂) at the flipped quantiles: the basic interval (s = 1; Davison &
    Hinkley 1997, §5.2) or the m-out-of-n interval (s = √(m/n); Chakraborty, Laber & Zhao 2013)."""
    draws = np.asarray([d for d in draws if d is not None], dtype=float)
    if estimate is None or draws.size < 2:
        return {"low": None, "high": None, "bootstrap_se": None, "n_replicates": int(draws.size)}
    low, high = percentile_interval(draws, level)
    if basic or scale != 1.0:
        low, high = estimate - scale * (high - estimate), estimate - scale * (low - estimate)
    se = float(np.std(draws, ddof=1) * scale)
    return {"low": low, "high": high, "bootstrap_se": se, "n_replicates": int(draws.size)}


def regime_pairs(names: list[str], reference: str = "usual_care") -> list[tuple[str, str]]:
    """Every pair once, as (regime, versus): the reference (default usual care) is always second; then usual care;
    otherwise in listing order."""
    pairs = [(a, b) for i, a in enumerate(names) for b in names[i + 1 :]]
    pairs = [(b, a) if a == "usual_care" else (a, b) for a, b in pairs]
    return [(b, a) if a == reference else (a, b) for a, b in pairs]


def compared_pairs(point: dict, reference: str = "usual_care") -> list[tuple[str, str]]:
    """The contrasts to bootstrap: every pair of the learned regime, usual care, the fixed strategies and the
    comparators, and each strategy of the protocol's ``strategies`` section against usual care (the trade-off
    table) and against the protocol's reference."""
    strategies = {r["name"] for r in point["regimes"] if "family" in r}
    pairs = regime_pairs([r["name"] for r in point["regimes"]], reference)
    return [(a, b) for a, b in pairs if not ({a, b} & strategies) or b in ("usual_care", reference)]


def contrast_of(values, a, b, est):
    """``a`` minus ``b`` by estimator ``est`` in {regime: {estimator: value}}, or None when either is missing."""
    x, y = values[a][est], values[b][est]
    return None if x is None or y is None else x - y


NO_RESAMPLE = {"method": "none (evaluation.replicates is 0)", "n": 0, "m": 0, "p_hat": None, "alpha": None}


def combine(point: dict, shards: list[dict], protocol: Protocol) -> dict:
    """Intervals for every regime × estimator and every contrast, and the estimators that disagree."""
    spec = protocol.evaluation
    good, failed = collect_replicates(shards, spec.replicates)
    size = shared_resample_size(shards) if shards else NO_RESAMPLE  # no shard jobs run without replicates
    expected = replicate_regime(protocol)
    regime = shared_regime(shards, expected) if shards else expected
    scale = math.sqrt(size["m"] / size["n"]) if size["n"] else 1.0
    values = point_values(point)
    reps = [r["values"] for r in good]
    basic = getattr(spec, "interval_method", "percentile") == "basic"
    settings = (spec.interval_level, scale, basic)
    judged = verdicts_of(point)
    reference = spec.reference
    value_intervals = {
        name: {
            est: withheld({"value": v, **interval(v, [r[name][est] for r in reps], *settings)}, judged.get((name, est)))
            for est, v in by_est.items()
        }
        for name, by_est in values.items()
    }
    contrasts = [
        withheld(
            {
                "regime": a,
                "versus": b,
                "estimator": est,
                "difference": contrast_of(values, a, b, est),
                **interval(contrast_of(values, a, b, est), [contrast_of(r, a, b, est) for r in reps], *settings),
            },
            worst(judged.get((a, est), SUPPORTED), judged.get((b, est), SUPPORTED)),
        )
        for a, b in compared_pairs(point, reference)
        for est in spec.estimators
    ]
    method = "m-out-of-n (Chakraborty, Laber & Zhao 2013)" if scale != 1.0 else ("basic" if basic else "percentile")
    return {
        "level": spec.interval_level,
        "method": method,
        "regime": regime,
        "reference": reference,
        "replicates": spec.replicates,
        "replicates_used": len(good),
        "replicates_failed": [{"replicate": r["replicate"], "error": r["error"]} for r in failed],
        "resample": size,
        "values": value_intervals,
        "contrasts": contrasts,
        "disagreements": disagreements(value_intervals),
    }


def verdicts_of(point: dict) -> dict:
    """{(regime, estimator): verdict} of values.json (:mod:`regimewise.evaluation.verdicts`)."""
    return {
        (r["name"], est): e.get("verdict", SUPPORTED) for r in point["regimes"] for est, e in r["estimates"].items()
    }


def withheld(entry: dict, verdict: str | None) -> dict:
    """``entry`` with its verdict; a value that is not identified keeps its raw number but gets no interval (the
    percentile limits the bootstrap would have given stay under ``unreported_interval``, for audit only)."""
    out = {**entry, "verdict": verdict or SUPPORTED}
    if out["verdict"] == NOT_IDENTIFIED:
        out.update(unreported_interval=[out["low"], out["high"]], low=None, high=None, bootstrap_se=None)
    return out


def replicate_regime(protocol: Protocol) -> str:
    """What the replicates do with the learned regime: ``evaluation.bootstrap_regime`` (``fixed`` or ``refit``), or
    ``none`` when the protocol learns no regime (``analysis.learn_regime: false``)."""
    return protocol.evaluation.bootstrap_regime if protocol.analysis.learn_regime else "none"


def shared_resample_size(shards: list[dict]) -> dict:
    """The resample size the shards recorded (all shards must agree)."""
    sizes = {tuple(sorted(s["resample"].items())) for s in shards}
    if len(sizes) != 1:
        raise UserInputError("bootstrap shards used different resample sizes; rerun every bootstrap shard.")
    return dict(sizes.pop())


def shared_regime(shards: list[dict], expected: str) -> str:
    """What the shards' replicates did with the learned regime (``fixed`` or ``refit``); all must match the protocol."""
    found = {s.get("regime") for s in shards}
    if found != {expected}:
        raise UserInputError(
            f"bootstrap shards were computed with bootstrap_regime {sorted(map(str, found))}, the protocol says "
            f"{expected!r}; rerun every bootstrap shard."
        )
    return expected


def disagreements(value_intervals: dict) -> list[dict]:
    """Pairs of estimators of one regime whose intervals do not overlap, with a short explanation."""
    out = []
    for name, by_est in value_intervals.items():
        names = [e for e, v in by_est.items() if v["low"] is not None and v.get("verdict") != NOT_IDENTIFIED]
        for i, a in enumerate(names):
            for b in names[i + 1 :]:
                x, y = by_est[a], by_est[b]
                if x["high"] < y["low"] or y["high"] < x["low"]:
                    out.append({"regime": name, "estimators": [a, b], "explanation": _explain(a, b)})
    return out


def _explain(a: str, b: str) -> str:
    families = {ESTIMATORS[a].family, ESTIMATORS[b].family}
    if families == {"weights"}:
        return (
            f"{a} and {b} use the same weights differently; unstable weights (few episodes following the "
            "regime) are the likely cause."
        )
    if "weights" in families:
        return (
            f"{a} and {b} disagree: either the weights are unstable (few episodes follow the regime) or the "
            "Q-model is misspecified; neither estimate should be trusted alone."
        )
    return (
        f"{a} and {b} disagree: the Q-model's predictions and the weighted corrections to them point apart, "
        "which suggests a misspecified Q-model."
    )


def merge_intervals(values: dict, intervals: dict | None) -> dict:
    """values.json with each estimate and learned-versus-usual-care contrast given its interval, for the report.

    Adds ``low``, ``high`` and ``bootstrap_se`` (null without a bootstrap) and, under ``bootstrap``, the
    interval settings, every pairwise contrast and the estimators that disagree. A value or contrast whose
    verdict is ``not identified`` (:mod:`regimewise.evaluation.verdicts`) loses its number and its interval here
    (``withheld`` is true): values.json keeps the raw number with the verdict, for audit only.
    """
    empty = {"low": None, "high": None, "bootstrap_se": None}
    found = (intervals or {}).get("values", {})
    pairs = {(c["regime"], c["versus"], c["estimator"]): c for c in (intervals or {}).get("contrasts", [])}
    keep = ("low", "high", "bootstrap_se")
    regimes = [
        {
            **r,
            "estimates": {
                est: publishable({**e, **{k: found.get(r["name"], {}).get(est, empty)[k] for k in keep}})
                for est, e in r["estimates"].items()
            },
        }
        for r in values["regimes"]
    ]
    contrasts = [
        publishable({**c, **{k: pairs.get((c["regime"], c["versus"], c["estimator"]), empty)[k] for k in keep}})
        for c in values["contrasts"]
    ]
    summary = None
    if intervals is not None:
        summary = {
            k: intervals[k]
            for k in (
                "level",
                "method",
                "regime",
                "reference",
                "replicates",
                "replicates_used",
                "resample",
                "disagreements",
            )
        }
        low = {(r["name"], est): e["low_ess"] for r in values["regimes"] for est, e in r["estimates"].items()}
        summary["contrasts"] = [
            publishable(
                {**c, "low_ess": bool(low[(c["regime"], c["estimator"])] or low[(c["versus"], c["estimator"])])}
            )
            for c in intervals["contrasts"]
        ]
        summary["replicates_failed"] = len(intervals["replicates_failed"])
    side = [
        {**r, "estimates": {est: publishable(e) for est, e in r["estimates"].items()}}
        for r in values.get("side_by_side", [])
    ]
    return {
        **values,
        "regimes": regimes,
        "contrasts": contrasts,
        "bootstrap": summary,
        **({"side_by_side": side} if "side_by_side" in values else {}),
    }


def publishable(entry: dict) -> dict:
    """A value or contrast as the report may show it: without number or interval when not identified."""
    if entry.get("verdict") != NOT_IDENTIFIED:
        return {**entry, "withheld": False}
    hidden = ("value", "difference", "se", "low", "high", "bootstrap_se")
    out = {k: v for k, v in entry.items() if k != "unreported_interval"}
    return {**out, **{k: None for k in hidden if k in entry}, "withheld": True}
