"""Bootstrap intervals for every regime's value and for the contrasts between regimes.

Each replicate resamples patients (the ``patient_id`` clusters, all of a patient's episodes together) with
replacement, refits usual care, the Q-models and the regime on the resample
(:func:`regimewise.regime.learning.learn_regime`)
and evaluates every regime by every estimator of the protocol (:func:`regimewise.evaluation.values.evaluate_all`). The
contrasts are differences of values *within* a replicate, so every contrast uses the same resamples.
Intervals are percentile intervals (Efron & Tibshirani 1993, An Introduction to the Bootstrap, ch. 13).

Replicate ``r`` draws its resample from stream ``("bootstrap", r)`` of :mod:`regimewise.core.seeds` — the
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

import warnings

import numpy as np
import pandas as pd

from regimewise.bootstrap.m_out_of_n import resample_size
from regimewise.core.features import RESAMPLED_FROM, patient_clusters
from regimewise.core.seeds import stream_rng
from regimewise.errors import UserInputError
from regimewise.evaluation.values import evaluate_all, point_values
from regimewise.io import to_jsonable
from regimewise.protocol.model import Protocol
from regimewise.regime.learning import (
    cross_fitted_regime,
    crossfit_folds,
    learn_regime,
    record_proba,
)
from regimewise.sensitivity.analysis import regime_curve, sensitivity_target
from regimewise.survival.analysis import survival_values
from regimewise.usual_care.fitting import fit_usual_care


# ---------------------------------------------------------------------------------------------- replicates
def replicate_rng(root_seed: int, replicate: int) -> np.random.Generator:
    """Generator of replicate ``replicate``: independent of shard layout."""
    return stream_rng(root_seed, "bootstrap", replicate)


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
    (:func:`regimewise.core.features.patient_clusters`).
    """
    draws = rng.integers(0, len(groups), size=size)
    rows = [groups[d] for d in draws]
    copy = np.repeat(np.arange(size), [len(r) for r in rows])
    out = decisions.iloc[np.concatenate(rows)].reset_index(drop=True)
    out[RESAMPLED_FROM] = patient_clusters(out)  # folds keep a patient's copies together
    out["patient_id"] = copy
    out["episode_id"] = pd.Series(copy).astype(str).str.cat(out["episode_id"].astype(str), sep="/")
    return out


def fit_replicate(decisions: pd.DataFrame, protocol: Protocol):
    """Refit usual care and the regime on ``decisions`` as the workflow does: usual care's probabilities at the
    records, the learned regime's actions and Q-values as evaluated (cross-fitted by patient when
    ``evaluation.cross_fit_folds`` > 1) and the folds of that cross-fitting (None with one fold)."""
    if protocol.evaluation.cross_fit_folds == 1:
        learned = learn_regime(decisions, protocol)
        proba = record_proba(learned, decisions)
        recommended, q = learned.recommend(decisions, proba), learned.q_values(decisions)
    else:
        proba = fit_usual_care(decisions, protocol).record_proba
        recommended, q = cross_fitted_regime(decisions, proba, protocol)
    return proba, recommended, q, crossfit_folds(decisions, protocol)


def learn_and_evaluate(decisions: pd.DataFrame, protocol: Protocol, strict: bool = False) -> tuple[dict, dict]:
    """Refit (:func:`fit_replicate`) and evaluate as the workflow does.

    Returns the output of :func:`regimewise.evaluation.values.evaluate_all` and the confounding-sensitivity curve
    of the refitted regime (:func:`regimewise.sensitivity.analysis.regime_curve`).
    """
    proba, recommended, q, folds = fit_replicate(decisions, protocol)
    values = evaluate_all(decisions, proba, recommended, protocol, strict=strict, learned_folds=folds, learned_q=q)
    return values, regime_curve(decisions, proba, recommended, protocol)


def replicate_values(decisions: pd.DataFrame, protocol: Protocol, episodes: pd.DataFrame | None = None) -> dict:
    """One replicate's {regime: {estimator: value}}, its bounds curve (so the sensitivity stage reuses the
    replicates) and, with a survival section and episodes, every strategy's survival (the survival stage's
    intervals)."""
    proba, recommended, q, folds = fit_replicate(decisions, protocol)
    values = evaluate_all(decisions, proba, recommended, protocol, strict=False, learned_folds=folds, learned_q=q)
    curve = regime_curve(decisions, proba, recommended, protocol, adoption=sensitivity_target(protocol)["adoption"])
    out = {
        "values": point_values(values),
        "sensitivity": {"learned": to_jsonable(curve["learned"]), "usual_care": curve["usual_care"]},
    }
    if protocol.survival is not None and episodes is not None:
        out["survival"] = survival_values(decisions, episodes, proba, recommended, protocol, learned_q=q)
    return out


def resample_episodes(episodes: pd.DataFrame, resample: pd.DataFrame) -> pd.DataFrame:
    """The episodes table of a resample: one row per resampled episode (``copy/original id``), in its order."""
    ids = resample["episode_id"].drop_duplicates().to_numpy()
    original = pd.Series(ids).str.split("/", n=1).str[1].to_numpy()
    out = episodes.set_index(episodes["episode_id"].astype(str)).loc[original].reset_index(drop=True)
    out["episode_id"] = ids
    return out


def run_replicate(decisions, groups, protocol: Protocol, replicate: int, size: int, rng=None, episodes=None) -> dict:
    """One replicate's values, or the reason it failed (a resample the models cannot be fitted to).

    ``rng`` defaults to the evaluation's stream for ``replicate`` (:func:`replicate_rng`).
    """
    rng = replicate_rng(protocol.seed, replicate) if rng is None else rng
    resample = resample_patients(decisions, groups, rng, size)
    resampled_episodes = None if episodes is None else resample_episodes(episodes, resample)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            return {"replicate": replicate, **replicate_values(resample, protocol, resampled_episodes)}
        except (UserInputError, np.linalg.LinAlgError) as err:
            return {"replicate": replicate, "error": str(err).splitlines()[0]}


def run_shard(decisions: pd.DataFrame, protocol: Protocol, shard: int, episodes: pd.DataFrame | None = None) -> dict:
    """Every replicate of one shard, with the resample size used (episodes: for the survival stage's intervals)."""
    spec = protocol.evaluation
    groups = patient_groups(decisions)
    size = resample_size(decisions, protocol)
    replicates = shard_replicates(spec.replicates, spec.shards, shard)
    return {
        "shard": shard,
        "shards": spec.shards,
        "resample": size,
        "replicates": [run_replicate(decisions, groups, protocol, r, size["m"], episodes=episodes) for r in replicates],
    }
