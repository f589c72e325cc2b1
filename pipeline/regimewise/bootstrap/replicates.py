"""Bootstrap intervals for every regime's value and for the contrasts between regimes.

Each replicate resamples patients (the ``patient_id`` clusters, all of a patient's episodes together) with
replacement, refits usual care and the evaluation's outcome models on the resample and evaluates every regime by
every estimator of the protocol (:func:`regimewise.evaluation.values.evaluate_all`). The contrasts are differences
of values *within* a replicate, so every contrast uses the same resamples. Intervals are percentile intervals
(Efron & Tibshirani 1993, An Introduction to the Bootstrap, ch. 13).

What a replicate does with the learned regime is the protocol's ``evaluation.bootstrap_regime``:

* ``fixed`` (default): the regime stays the one learned from the records (:class:`HeldRegime`). Each patient copy
  keeps the actions and Q-values its original patient got from the regime learned without that patient's
  cross-fitting fold, and stays in that fold, whose outcome models are refitted on the fold's copies; patients are
  resampled within their folds, so each fold keeps its number of patients, as the fold split dealt them. The
  replicates then vary only what the evaluation estimates, and the interval is for the data-adaptive target the
  cross-fitted estimate aims at: the mean true value of the regimes actually learned from these records. This is
  the sample-split data-adaptive target parameter of Hubbard, Kherad-Pajouh & van der Laan (2016, Int J Biostat
  12(1); title, journal and definition checked against the published abstract, pages 3-19 from memory): the
  average over the V splits of the parameter each parameter-generating sample defines, estimated on its
  estimation sample, with a central limit theorem that treats the learned parameters as given. For the value of
  a learned rule see also van der Laan & Luedtke (2015, J Causal Inference 3(1):61-95, from memory) and, for the
  related online scheme that learns the rule on earlier observations and evaluates it on later ones, Luedtke & van
  der Laan (2016, Ann Stat 44(2):713-742, checked). The interval says nothing about how a regime learned from
  another sample would fare.
* ``refit``: each replicate repeats the regime learning (:func:`regimewise.regime.learning.learn_regime`, with
  the cross-fitting, pessimism ensembles and all) on the resample. Its spread includes the variability of
  learning, but a regime learned from a resample, where about 37% of the patients are missing and the others
  duplicated, is typically worse than the one learned from the records, so the replicates sit below the estimate
  and the percentile interval does not cover the value of the regime the report describes (bench/RESULTS.md,
  bench_strategy_coverage.py).

Replicate ``r`` draws its resample from stream ``("bootstrap", r)`` of :mod:`regimewise.core.seeds` — the
``r``-th child of the bootstrap stream's child of the root seed — so its bytes depend neither on the shard that
runs it nor on the number of shards.

Optionally (``refit`` only), the adaptive m-out-of-n bootstrap (Chakraborty, Laber & Zhao 2013, Biometrics
69:714-723) resamples ``m = ceil(n^((1 + α(1 − p̂)) / (1 + α)))`` of the ``n`` patients, where ``p̂`` estimates how
often the optimal action is non-unique (near-tied), and forms the interval from the quantiles of
``√m (θ*_m − θ̂)`` rescaled by ``√n``. ``p̂`` is the share of decisions after the first (whose maxima feed earlier
pseudo-outcomes) at which the two best permitted actions pass a pretest of equality at level ν = 0.001, i.e.
``gap² ≤ χ²₁(1 − ν) · Var̂(gap)`` (the paper's pretest; Var̂ from the sandwich covariance of each step's
least-squares Q-model). The paper chooses α by a double bootstrap; here α is the protocol's ``m_out_of_n_alpha``
(default 0.1, the value the paper's simulations found adequate — from memory).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd

from regimewise.bootstrap.intervals import replicate_regime
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
from regimewise.sensitivity.analysis import (
    bounded_actions,
    bounded_comparators,
    comparator_curves,
    regime_curve,
    sensitivity_target,
)
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


@dataclass(frozen=True)
class HeldRegime:
    """The learned regime as the evaluation scored it, held fixed in the replicates (``bootstrap_regime: fixed``).

    Per row of the records: the action (code) of the regime learned without the row's patient, that regime's
    Q-values (n, K) for the override strategies, and the cross-fitting fold (None without cross-fitting).
    """

    recommended: np.ndarray
    q: np.ndarray
    folds: np.ndarray | None

    def at(self, rows: np.ndarray) -> HeldRegime:
        """The regime at the rows of a resample (each copy keeps its original row's action, Q-values and fold)."""
        return HeldRegime(self.recommended[rows], self.q[rows], None if self.folds is None else self.folds[rows])


def held_regime(decisions: pd.DataFrame, protocol: Protocol) -> HeldRegime | None:
    """The regime learned from ``decisions`` (:func:`fit_replicate`) to hold fixed, or None with ``refit``.

    The workflow reads it from the regime stage's table instead (``evaluated`` and ``evaluated_q_*``), which holds
    the same numbers.
    """
    if protocol.evaluation.bootstrap_regime == "refit":
        return None
    _, recommended, q, folds = fit_replicate(decisions, protocol)
    return HeldRegime(recommended, q, folds)


def draw_patients(groups: list[np.ndarray], rng, size: int, strata: np.ndarray | None = None) -> list[np.ndarray]:
    """Row positions of ``size`` patients drawn with replacement, one array per draw.

    With ``strata`` (one label per patient) each stratum is resampled on its own to its own size, stratum after
    stratum in sorted order, and ``size`` must be the number of patients.
    """
    if strata is None:
        return [groups[d] for d in rng.integers(0, len(groups), size=size)]
    if size != len(groups):
        raise UserInputError("a resample within cross-fitting folds keeps every fold's size; m-out-of-n cannot.")
    out = []
    for label in np.unique(strata):
        members = np.flatnonzero(strata == label)
        out += [groups[members[d]] for d in rng.integers(0, members.size, size=members.size)]
    return out


def resample_frame(decisions: pd.DataFrame, draws: list[np.ndarray]) -> pd.DataFrame:
    """The rows of the drawn patients; each draw becomes a new patient with new episode ids.

    The column ``resampled_from`` keeps the original patient, so cross-fitting folds keep copies together
    (:func:`regimewise.core.features.patient_clusters`).
    """
    copy = np.repeat(np.arange(len(draws)), [len(r) for r in draws])
    out = decisions.iloc[np.concatenate(draws)].reset_index(drop=True)
    out[RESAMPLED_FROM] = patient_clusters(out)  # folds keep a patient's copies together
    out["patient_id"] = copy
    out["episode_id"] = pd.Series(copy).astype(str).str.cat(out["episode_id"].astype(str), sep="/")
    return out


def resample_patients(decisions: pd.DataFrame, groups: list[np.ndarray], rng, size: int) -> pd.DataFrame:
    """Draw ``size`` patients with replacement (:func:`draw_patients`, :func:`resample_frame`)."""
    return resample_frame(decisions, draw_patients(groups, rng, size))


def fit_replicate(decisions: pd.DataFrame, protocol: Protocol, held: HeldRegime | None = None):
    """Refit usual care and the regime on ``decisions`` as the workflow does: usual care's probabilities at the
    records, the learned regime's actions and Q-values as evaluated (cross-fitted by patient when
    ``evaluation.cross_fit_folds`` > 1) and the folds of that cross-fitting (None with one fold).

    With ``held`` (rows aligned with ``decisions``) only usual care is refitted; the regime and folds are ``held``'s.
    With ``analysis.learn_regime: false`` only usual care is fitted, and the regime, Q-values and folds are None.
    """
    if not protocol.analysis.learn_regime:
        return fit_usual_care(decisions, protocol).record_proba, None, None, None
    if held is not None:
        return fit_usual_care(decisions, protocol).record_proba, held.recommended, held.q, held.folds
    if protocol.evaluation.cross_fit_folds == 1:
        learned = learn_regime(decisions, protocol)
        proba = record_proba(learned, decisions)
        recommended, q = learned.recommend(decisions, proba), learned.q_values(decisions)
    else:
        usual_care = fit_usual_care(decisions, protocol)
        proba = usual_care.record_proba
        # the replicate's usual-care model starts the folds' fits (the same maxima, fewer Newton iterations)
        recommended, q = cross_fitted_regime(decisions, proba, protocol, start=usual_care.model)
        del usual_care
    return proba, recommended, q, crossfit_folds(decisions, protocol)


def learn_and_evaluate(
    decisions: pd.DataFrame,
    protocol: Protocol,
    strict: bool = False,
    held: HeldRegime | None = None,
    target: bool = False,
) -> tuple[dict, dict]:
    """Refit (:func:`fit_replicate`) and evaluate as the workflow does.

    Returns the output of :func:`regimewise.evaluation.values.evaluate_all` and the confounding-sensitivity curve
    (:func:`regimewise.sensitivity.analysis.regime_curve`) of the learned regime, or with ``target`` of the
    sensitivity stage's target (:func:`target_curve`, as every replicate computes it).
    """
    proba, recommended, q, folds = fit_replicate(decisions, protocol, held)
    values = evaluate_all(decisions, proba, recommended, protocol, strict=strict, learned_folds=folds, learned_q=q)
    if target:
        return values, target_curve(decisions, proba, recommended, protocol)
    return values, regime_curve(decisions, proba, recommended, protocol)


def target_curve(decisions: pd.DataFrame, proba: np.ndarray, recommended, protocol: Protocol) -> dict:
    """The bounds curve of the regime the sensitivity stage bounds (:func:`sensitivity_target`: the headline
    partial adoption, the learned regime or the headline named strategy), given usual care's probabilities and the
    learned regime's actions at ``decisions``."""
    bounded = bounded_actions(decisions, protocol, recommended)
    return regime_curve(decisions, proba, bounded, protocol, adoption=sensitivity_target(protocol)["adoption"])


def replicate_values(
    decisions: pd.DataFrame, protocol: Protocol, episodes: pd.DataFrame | None = None, held: HeldRegime | None = None
) -> dict:
    """One replicate's {regime: {estimator: value}}, its bounds curve (so the sensitivity stage reuses the
    replicates) and, with a survival section and episodes, every strategy's survival (the survival stage's
    intervals). ``held``: the regime held fixed at the resample's rows (None: learned again)."""
    proba, recommended, q, folds = fit_replicate(decisions, protocol, held)
    values = evaluate_all(decisions, proba, recommended, protocol, strict=False, learned_folds=folds, learned_q=q)
    curve = target_curve(decisions, proba, recommended, protocol)
    out = {
        "values": point_values(values),
        "sensitivity": {"bounded": to_jsonable(curve["bounded"]), "usual_care": curve["usual_care"]},
    }
    if bounded_comparators(protocol):
        curves = comparator_curves(decisions, proba, protocol)
        out["sensitivity"]["comparators"] = {name: to_jsonable(c["bounded"]) for name, c in curves.items()}
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


def run_replicate(
    decisions, groups, protocol: Protocol, replicate: int, size: int, rng=None, episodes=None, held=None
) -> dict:
    """One replicate's values, or the reason it failed (a resample the models cannot be fitted to).

    ``rng`` defaults to the evaluation's stream for ``replicate`` (:func:`replicate_rng`). With ``held`` (a
    :class:`HeldRegime` of the records' rows) patients are resampled within their cross-fitting folds and keep the
    held regime; without it the regime is learned again on the resample.
    """
    rng = replicate_rng(protocol.seed, replicate) if rng is None else rng
    strata = None if held is None or held.folds is None else np.array([held.folds[g[0]] for g in groups])
    draws = draw_patients(groups, rng, size, strata)
    resample = resample_frame(decisions, draws)
    resampled_held = None if held is None else held.at(np.concatenate(draws))
    resampled_episodes = None if episodes is None else resample_episodes(episodes, resample)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            return {"replicate": replicate, **replicate_values(resample, protocol, resampled_episodes, resampled_held)}
        except (UserInputError, np.linalg.LinAlgError) as err:
            return {"replicate": replicate, "error": str(err).splitlines()[0]}


def run_shard(
    decisions: pd.DataFrame,
    protocol: Protocol,
    shard: int,
    episodes: pd.DataFrame | None = None,
    held: HeldRegime | None = None,
) -> dict:
    """Every replicate of one shard, with the resample size used (episodes: for the survival stage's intervals).

    With ``bootstrap_regime: fixed`` the replicates hold ``held`` fixed, learned here from ``decisions`` when not
    given (:func:`held_regime`); with ``refit`` ``held`` is ignored.
    """
    spec = protocol.evaluation
    if spec.bootstrap_regime == "refit" or not protocol.analysis.learn_regime:
        held = None
    elif held is None:
        held = held_regime(decisions, protocol)
    groups = patient_groups(decisions)
    size = resample_size(decisions, protocol)
    replicates = shard_replicates(spec.replicates, spec.shards, shard)
    return {
        "shard": shard,
        "shards": spec.shards,
        "regime": replicate_regime(protocol),
        "resample": size,
        "replicates": [
            run_replicate(decisions, groups, protocol, r, size["m"], episodes=episodes, held=held) for r in replicates
        ],
    }
