"""Bootstrap intervals for every regime's value and for the contrasts between regimes.

Each replicate resamples patients (the ``patient_id`` clusters, all of a patient's episodes together) with
replacement, refits usual care, the Q-models and the regime on the resample (:func:`regimewise.regime.learn_regime`)
and evaluates every regime by every estimator of the protocol (:func:`regimewise.evaluate.evaluate_all`). The
contrasts are differences of values *within* a replicate, so every contrast uses the same resamples.
Intervals are percentile intervals (Efron & Tibshirani 1993, An Introduction to the Bootstrap, ch. 13).

Replicate ``r`` draws its resample from ``SeedSequence(root_seed, spawn_key=(BOOTSTRAP_STREAM, r))`` — the
``r``-th child of the bootstrap stream's child of the root seed — so its bytes depend neither on the shard that
runs it nor on the number of shards.

Optionally, the adaptive m-out-of-n bootstrap (Chakraborty, Laber & Zhao 2013, Biometrics 69:714-723) resamples
``m = ceil(n^((1 + α(1 − p̂)) / (1 + α)))`` of the ``n`` patients, where ``p̂`` estimates how often the optimal
action is non-unique (near-tied), and forms the interval from the quantiles of ``√m (θ*_m − θ̂)`` rescaled by
``√n``. ``p̂`` is the share of decisions after the first (whose maxima feed earlier pseudo-outcomes) at which
the two best permitted actions pass a pretest of equality at level ν = 0.001, i.e. ``gap² ≤ χ²₁(1 − ν) · Var̂(gap)``
(the paper's pretest; Var̂ from the sandwich covariance of each step's least-squares Q-model).
The paper chooses α by a double bootstrap; here α is the protocol's ``m_out_of_n_alpha`` (default 0.1, the
value the paper's simulations found adequate — from memory).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd
from scipy import stats

from . import evaluate, regime, sensitivity
from .errors import UserInputError
from .io import to_jsonable
from .features import RESAMPLED_FROM, action_codes, patient_clusters
from .protocol import Protocol
from .quantiles import bootstrap_quantile

BOOTSTRAP_STREAM = 6
PRETEST_LEVEL = 0.001
FAMILY = {
    "is": "weights", "wis": "weights", "pdis": "weights", "pdwis": "weights",
    "dr": "both", "wdr": "both", "fqe": "model",
}  # fmt: skip


# ---------------------------------------------------------------------------------------------- replicates
def replicate_rng(root_seed: int, replicate: int) -> np.random.Generator:
    """Generator of replicate ``replicate``: independent of shard layout."""
    return np.random.default_rng(np.random.SeedSequence(root_seed, spawn_key=(BOOTSTRAP_STREAM, replicate)))


def shard_replicates(n_replicates: int, n_shards: int, shard: int) -> range:
    """Replicates of shard ``shard``: contiguous blocks whose sizes differ by at most one."""
    if not 0 <= shard < n_shards:
        raise UserInputError(f"bootstrap shard {shard} does not exist; shards are 0..{n_shards - 1}.")
    base, extra = divmod(n_replicates, n_shards)
    start = shard * base + min(shard, extra)
    return range(start, start + base + (shard < extra))


def patient_groups(decisions: pd.DataFrame) -> list[np.ndarray]:
    """Row positions of each patient (in order of first appearance); rows stay sorted by episode and step."""
    codes = pd.factorize(decisions["patient_id"], sort=False)[0]
    order = np.argsort(codes, kind="stable")
    return np.split(order, np.flatnonzero(np.diff(codes[order])) + 1)


def resample_patients(decisions: pd.DataFrame, groups: list[np.ndarray], rng, size: int) -> pd.DataFrame:
    """Draw ``size`` patients with replacement; each draw becomes a new patient with new episode ids.

    The column ``resampled_from`` keeps the original patient, so cross-fitting folds keep copies together
    (:func:`regimewise.features.patient_clusters`).
    """
    draws = rng.integers(0, len(groups), size=size)
    rows = [groups[d] for d in draws]
    copy = np.repeat(np.arange(size), [len(r) for r in rows])
    out = decisions.iloc[np.concatenate(rows)].reset_index(drop=True)
    out[RESAMPLED_FROM] = patient_clusters(out)  # folds keep a patient's copies together
    out["patient_id"] = copy
    out["episode_id"] = pd.Series(copy).astype(str).str.cat(out["episode_id"].astype(str), sep="/")
    return out


def learn_and_evaluate(decisions: pd.DataFrame, protocol: Protocol, strict: bool = False) -> tuple[dict, dict]:
    """Refit usual care, the Q-models and the regime on ``decisions`` and evaluate it as the workflow does.

    Returns the output of :func:`regimewise.evaluate.evaluate_all` and the confounding-sensitivity curve of the
    refitted regime (:func:`regimewise.sensitivity.regime_curve`). With ``evaluation.cross_fit_folds`` > 1, usual
    care is fitted on all of ``decisions`` and the regime is cross-fitted by patient, as in the evaluate stage.
    """
    if protocol.evaluation.cross_fit_folds == 1:
        learned = regime.learn_regime(decisions, protocol)
        proba = record_proba(learned, decisions)
        recommended = learned.recommend(decisions, proba)
    else:
        proba = regime.fit_usual_care(decisions, protocol).record_proba
        recommended = regime.cross_fitted_recommendations(decisions, proba, protocol)
    folds = regime.crossfit_folds(decisions, protocol)
    values = evaluate.evaluate_all(decisions, proba, recommended, protocol, strict=strict, learned_folds=folds)
    return values, sensitivity.regime_curve(decisions, proba, recommended, protocol)


def replicate_values(decisions: pd.DataFrame, protocol: Protocol) -> tuple[dict, dict]:
    """{regime: {estimator: value}} and the bounds curve of one replicate (:func:`learn_and_evaluate`), so the
    sensitivity stage reuses these replicates."""
    values, curve = learn_and_evaluate(decisions, protocol)
    return evaluate.point_values(values), {"learned": to_jsonable(curve["learned"]), "usual_care": curve["usual_care"]}


def record_proba(learned, decisions: pd.DataFrame) -> np.ndarray:
    """Usual care's probabilities at the training records, as the regime stage uses them (cross-fitted if so)."""
    fitted = getattr(learned.usual_care, "record_proba", None)
    return learned.usual_care.predict_proba(decisions) if fitted is None else fitted


def run_replicate(decisions, groups, protocol: Protocol, replicate: int, size: int, rng=None) -> dict:
    """One replicate's values, or the reason it failed (a resample the models cannot be fitted to).

    ``rng`` defaults to the evaluation's stream for ``replicate`` (:func:`replicate_rng`).
    """
    rng = replicate_rng(protocol.seed, replicate) if rng is None else rng
    resample = resample_patients(decisions, groups, rng, size)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            values, curve = replicate_values(resample, protocol)
            return {"replicate": replicate, "values": values, "sensitivity": curve}
        except (UserInputError, np.linalg.LinAlgError) as err:
            return {"replicate": replicate, "error": str(err).splitlines()[0]}


def run_shard(decisions: pd.DataFrame, protocol: Protocol, shard: int) -> dict:
    """Every replicate of one shard, with the resample size used."""
    spec = protocol.evaluation
    groups = patient_groups(decisions)
    size = resample_size(decisions, protocol)
    replicates = shard_replicates(spec.replicates, spec.shards, shard)
    return {
        "shard": shard,
        "shards": spec.shards,
        "resample": size,
        "replicates": [run_replicate(decisions, groups, protocol, r, size["m"]) for r in replicates],
    }


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
    return {"method": "adaptive m-out-of-n", "n": n, "m": adaptive_m(n, p_hat, spec.m_out_of_n_alpha),
            "p_hat": p_hat, "alpha": spec.m_out_of_n_alpha}  # fmt: skip


def adaptive_m(n: int, p_hat: float, alpha: float) -> int:
    """m = ceil(n^((1 + α(1 − p̂)) / (1 + α))) (Chakraborty, Laber & Zhao 2013): n when p̂ = 0."""
    return min(n, math.ceil(n ** ((1 + alpha * (1 - p_hat)) / (1 + alpha)) - 1e-9))


def nonregularity_share(decisions: pd.DataFrame, protocol: Protocol) -> float:
    """p̂: share of decisions after the first where the two best permitted actions are not distinguishable.

    Tested by ``gap² ≤ χ²₁(1 − ν) Var̂(gap)`` with ν = 0.001 (Chakraborty, Laber & Zhao 2013), where the gap's
    variance adds the sandwich variances of the two actions' fitted Q-values (separate least-squares fits
    per step and action, the protocol's linear Q-model; the pseudo-outcomes are treated as fixed).
    """
    learned = regime.learn_regime(decisions, protocol)
    proba = record_proba(learned, decisions)
    q = learned.q_values(decisions)
    step = decisions["step"].to_numpy(dtype=np.int64)
    taken = action_codes(decisions, protocol.action_labels)
    design = np.column_stack([np.ones(len(decisions)), learned.q_features.transform(decisions)])
    residual = _pseudo_outcome(decisions, q, learned.recommend(decisions, proba), protocol) - q[
        np.arange(len(q)), taken
    ]
    masked = np.where(proba >= protocol.constraints.support_threshold, q, -np.inf)
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


def regime_pairs(names: list[str]) -> list[tuple[str, str]]:
    """Every pair once: against usual care, usual care is the reference; otherwise in listing order."""
    pairs = [(a, b) for i, a in enumerate(names) for b in names[i + 1 :]]
    return [(b, a) if a == "usual_care" else (a, b) for a, b in pairs]


def _difference(values, a, b, est):
    x, y = values[a][est], values[b][est]
    return None if x is None or y is None else x - y


def combine(point: dict, shards: list[dict], protocol: Protocol) -> dict:
    """Intervals for every regime × estimator and every contrast, and the estimators that disagree."""
    spec = protocol.evaluation
    good, failed = collect_replicates(shards, spec.replicates)
    size = shared_resample_size(shards)
    scale = math.sqrt(size["m"] / size["n"]) if size["n"] else 1.0
    values = evaluate.point_values(point)
    reps = [r["values"] for r in good]
    basic = getattr(spec, "interval_method", "percentile") == "basic"
    settings = (spec.interval_level, scale, basic)
    value_intervals = {
        name: {est: {"value": v, **interval(v, [r[name][est] for r in reps], *settings)} for est, v in by_est.items()}
        for name, by_est in values.items()
    }
    contrasts = [
        {"regime": a, "versus": b, "estimator": est, "difference": _difference(values, a, b, est),
         **interval(_difference(values, a, b, est), [_difference(r, a, b, est) for r in reps], *settings)}
        for a, b in regime_pairs(list(values)) for est in spec.estimators
    ]  # fmt: skip
    method = "m-out-of-n (Chakraborty, Laber & Zhao 2013)" if scale != 1.0 else ("basic" if basic else "percentile")
    return {
        "level": spec.interval_level,
        "method": method,
        "replicates": spec.replicates,
        "replicates_used": len(good),
        "replicates_failed": [{"replicate": r["replicate"], "error": r["error"]} for r in failed],
        "resample": size,
        "values": value_intervals,
        "contrasts": contrasts,
        "disagreements": disagreements(value_intervals),
    }


def shared_resample_size(shards: list[dict]) -> dict:
    """The resample size the shards recorded (all shards must agree)."""
    sizes = {tuple(sorted(s["resample"].items())) for s in shards}
    if len(sizes) != 1:
        raise UserInputError("bootstrap shards used different resample sizes; rerun every bootstrap shard.")
    return dict(sizes.pop())


def disagreements(value_intervals: dict) -> list[dict]:
    """Pairs of estimators of one regime whose intervals do not overlap, with a short explanation."""
    out = []
    for name, by_est in value_intervals.items():
        names = [e for e, v in by_est.items() if v["low"] is not None]
        for i, a in enumerate(names):
            for b in names[i + 1 :]:
                x, y = by_est[a], by_est[b]
                if x["high"] < y["low"] or y["high"] < x["low"]:
                    out.append({"regime": name, "estimators": [a, b], "explanation": _explain(a, b)})
    return out


def _explain(a: str, b: str) -> str:
    families = {FAMILY[a], FAMILY[b]}
    if families == {"weights"}:
        return (f"{a} and {b} use the same weights differently; unstable weights (few episodes following the "
                "regime) are the likely cause.")  # fmt: skip
    if "weights" in families:
        return (f"{a} and {b} disagree: either the weights are unstable (few episodes follow the regime) or the "
                "Q-model is misspecified; neither estimate should be trusted alone.")  # fmt: skip
    return (f"{a} and {b} disagree: the Q-model's predictions and the weighted corrections to them point apart, "
            "which suggests a misspecified Q-model.")  # fmt: skip


def merge_intervals(values: dict, intervals: dict | None) -> dict:
    """values.json with each estimate and learned-versus-usual-care contrast given its interval.

    Adds ``low``, ``high`` and ``bootstrap_se`` (null without a bootstrap) and, under ``bootstrap``, the
    interval settings, every pairwise contrast and the estimators that disagree.
    """
    empty = {"low": None, "high": None, "bootstrap_se": None}
    found = (intervals or {}).get("values", {})
    pairs = {(c["regime"], c["versus"], c["estimator"]): c for c in (intervals or {}).get("contrasts", [])}
    keep = ("low", "high", "bootstrap_se")
    regimes = [
        {**r, "estimates": {est: {**e, **{k: found.get(r["name"], {}).get(est, empty)[k] for k in keep}}
                            for est, e in r["estimates"].items()}}
        for r in values["regimes"]
    ]  # fmt: skip
    contrasts = [
        {**c, **{k: pairs.get((c["regime"], c["versus"], c["estimator"]), empty)[k] for k in keep}}
        for c in values["contrasts"]
    ]
    summary = None
    if intervals is not None:
        summary = {k: intervals[k] for k in ("level", "method", "replicates", "replicates_used", "resample",
                                              "disagreements")}  # fmt: skip
        low = {(r["name"], est): e["low_ess"] for r in values["regimes"] for est, e in r["estimates"].items()}
        summary["contrasts"] = [
            {**c, "low_ess": bool(low[(c["regime"], c["estimator"])] or low[(c["versus"], c["estimator"])])}
            for c in intervals["contrasts"]
        ]
        summary["replicates_failed"] = len(intervals["replicates_failed"])
    return {**values, "regimes": regimes, "contrasts": contrasts, "bootstrap": summary}
