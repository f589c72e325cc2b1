"""The research protocol: one YAML file, validated by a pydantic model with unknown keys forbidden.

Every setting a stage reads lives here, with its constraint in its type. Paths inside the protocol resolve
relative to the protocol file. ``config/protocol.schema.json`` is exported from :class:`Protocol` by
:func:`export_schema` and never edited by hand.

Clinical rules and reward definitions are structured data, never expression strings: nothing in a protocol is
ever evaluated as code.
"""

from __future__ import annotations

import re
from typing import Annotated, Literal

from pydantic import Field, model_validator

from regimewise.protocol.terms import ModelTerm, term_text
from regimewise.protocol.types import (
    FINITE,
    NOT_BOOLEAN,
    ColumnName,
    EstimatorName,
    Flag,
    FreeText,
    Identifier,
    LevelLabel,
    LongText,
    Number,
    Probability,
    ShortText,
    Strict,
    WholeNumber,
)


class Study(Strict):
    """Study metadata shown at the top of the report."""

    title: ShortText
    question: LongText
    version: Annotated[FreeText, Field(min_length=1, max_length=40)]
    run_name: Identifier = Field(description="results go under <results>/<run_name>/ unless --out is given")


class ColumnMap(Strict):
    """Names of the data-contract columns in the decisions file."""

    episode_id: ColumnName = "episode_id"
    patient_id: ColumnName | None = Field(
        "patient_id",
        description="resampling cluster; null, or left out when the file has no patient_id column: each episode is "
        "its own patient (validation.json and the report say so)",
    )
    step: ColumnName = "step"
    day: ColumnName | None = Field(
        "day",
        description="whole days since the episode's index date; null, or left out when the file has no day column: "
        "the decision index (step) stands in (validation.json and the report say so; survival needs real days)",
    )
    action: ColumnName = "action"
    reward: ColumnName = "reward"
    followup: ColumnName = Field("followup_days", description="episodes table: days from index to event or censoring")
    event: ColumnName = Field("event", description="episodes table: 1 event observed, 0 censored")


class AcknowledgedColumn(Strict):
    """A column whose name or values look like an identifier, kept on purpose with a written justification."""

    column: ColumnName
    justification: Annotated[FreeText, Field(min_length=20, max_length=1000)] = Field(
        description="why this column is not a direct identifier (recorded in the report)"
    )


MissingPolicy = Literal["refuse", "drop", "carry_forward", "indicator"]


class DataSpec(Strict):
    """Where the records are and how their columns are named."""

    decisions: ColumnName = Field(description="decisions table (CSV or Parquet), relative to the protocol file")
    episodes: ColumnName | None = Field(None, description="optional episodes table, relative to the protocol file")
    root: ColumnName = Field(".", description="folder the record paths must stay inside, relative to the protocol file")
    delimiter: Literal[",", ";", "\t"] = Field(",", description="field separator of CSV files")
    columns: ColumnMap = ColumnMap()
    missing: dict[Identifier, MissingPolicy] = Field(
        default_factory=dict,
        description="per state: refuse (default), drop the decision point and the rest of its episode, "
        "carry_forward the episode's last observation, or indicator (fill with the observed median and add "
        "<state>_missing)",
    )
    acknowledged_columns: Annotated[list[AcknowledgedColumn], Field(max_length=50)] = Field(
        default_factory=list, description="identifier-like columns kept on purpose, each with a justification"
    )


STATE_NAME = re.compile(r"^[a-z][a-z0-9_]{0,39}$")


def state_name_for(column: str) -> str:
    """The state name a column name maps to: lower case, every run of other characters one ``_`` (``L`` ->
    ``l``, ``SBP (mmHg)`` -> ``sbp_mmhg``, ``2nd_line`` -> ``s_2nd_line``)."""
    name = re.sub(r"[^a-z0-9]+", "_", column.lower()).strip("_")
    return name if not name or name[:1].isalpha() else f"s_{name}"


class StateVariable(Strict):
    """One state variable observed at every decision point.

    A ``categorical`` state lists its ``levels`` (the protocol fixes them before the analysis; they are never read
    from the records, so a stray value, possibly an identifier, can never become a level). Every model codes it by
    treatment (dummy) coding against ``reference``: one 0/1 column per other level. A level with fewer decisions
    than ``report.min_cell_count`` stops validation with one line naming it, or, with ``rare_levels: merge``, is
    merged into ``other_level`` (the reference level is never merged).

    A ``name`` that is not lower-case snake case (``L``, ``SBP_mmHg``) is taken as the column's name when no
    ``column`` is given: the state reads that column and is called :func:`state_name_for` of it everywhere else
    in the protocol (clinical rules, data.missing, the report).
    """

    name: Identifier
    column: ColumnName | None = Field(
        None,
        description="column in the decisions file; defaults to name (a name such as L or SBP_mmHg maps to l, sbp_mmhg)",
    )

    @model_validator(mode="before")
    @classmethod
    def _map_column_name(cls, data):
        if isinstance(data, dict) and data.get("column") is None:
            name = data.get("name")
            if isinstance(name, str) and 0 < len(name) <= 128 and not STATE_NAME.match(name):
                mapped = state_name_for(name)
                if STATE_NAME.match(mapped):
                    return {**data, "name": mapped, "column": name}
        return data

    label: ShortText
    kind: Literal["continuous", "integer", "binary", "categorical"]
    unit: Annotated[FreeText, Field(max_length=40)] = ""
    plausible_range: tuple[Number, Number] | None = Field(
        None,
        description="[low, high] (continuous, integer and binary states; required there); values outside are refused",
    )
    levels: Annotated[list[LevelLabel], Field(min_length=2, max_length=50)] | None = Field(
        None,
        description="categorical states only (required there): every level as written in the records; any other "
        "value is a validation finding",
    )
    reference: LevelLabel | None = Field(
        None, description="categorical: the level the others are compared with (dummy coding); default the first level"
    )
    rare_levels: Literal["refuse", "merge"] = Field(
        "refuse",
        description="categorical: a level with fewer decisions than report.min_cell_count is refused (validation "
        "stops), or merged into other_level",
    )
    other_level: LevelLabel = Field("other", description="categorical with rare_levels: merge: the merged level's name")

    @model_validator(mode="after")
    def _range_ordered(self) -> StateVariable:
        if self.kind == "categorical":
            return self._levels_valid()
        if self.plausible_range is None:
            raise ValueError(f"state {self.name!r} ({self.kind}) needs plausible_range: [low, high]")
        given = {"levels": self.levels, "reference": self.reference}
        given |= {"rare_levels": self.rare_levels != "refuse", "other_level": self.other_level != "other"}
        extra = sorted(key for key, value in given.items() if value)  # a dumped protocol holds the defaults
        if extra:
            raise ValueError(f"state {self.name!r}: {extra[0]} applies to categorical states only; remove it")
        low, high = self.plausible_range
        if not low < high:
            raise ValueError(f"plausible_range of {self.name!r} must have low < high, got [{low}, {high}]")
        if self.kind == "binary" and (low, high) != (0.0, 1.0):
            raise ValueError(f"binary state {self.name!r} must have plausible_range [0, 1]")
        return self

    def _levels_valid(self) -> StateVariable:
        where = f"categorical state {self.name!r}"
        if self.levels is None:
            raise ValueError(f"{where} needs levels: [the levels as written in the records]")
        if self.plausible_range is not None:
            raise ValueError(f"{where}: plausible_range applies to numeric states; list the levels instead")
        repeated = sorted({v for v in self.levels if self.levels.count(v) > 1})
        if repeated:
            raise ValueError(f"{where} lists level {repeated[0]!r} twice")
        if self.reference is not None and self.reference not in self.levels:
            raise ValueError(f"{where}: reference {self.reference!r} is not one of its levels {self.levels}")
        if self.rare_levels == "merge" and self.other_level in self.levels:
            raise ValueError(f"{where}: other_level {self.other_level!r} is already a level; name the merged level")
        return self

    @property
    def reference_level(self) -> str:
        """The categorical state's reference level (the first level unless ``reference`` names another)."""
        return self.reference or self.levels[0]

    @property
    def coded_levels(self) -> tuple[str, ...]:
        """Every level a categorical state's clean values can take: the listed levels, then ``other_level`` when
        rare levels are merged."""
        return (*self.levels, *((self.other_level,) if self.rare_levels == "merge" else ()))

    @property
    def source_column(self) -> str:
        return self.column or self.name


class Action(Strict):
    """One label of the action set."""

    label: Identifier
    description: ShortText
    intensity: Annotated[WholeNumber, Field(ge=-10, le=10)] | None = Field(
        None,
        description="ordinal change in therapy intensity this action makes (e.g. -1 step down, 0 hold, +1 "
        "step up); needed only for constraints.max_intensity_change",
    )


class RewardSpec(Strict):
    """The reward is the decisions file's reward column, observed after the action."""

    description: LongText
    better: Literal["higher", "lower"] = Field(
        "higher",
        description="which direction of the reward is better: higher (a score) or lower (a cost, a blood pressure); "
        "with lower the regime is learned on the negated reward, and values and differences stay in the reward's "
        "own units, a negative difference from usual care then being a benefit",
    )

    @property
    def sign(self) -> float:
        """+1 when higher is better, −1 when lower is: the reward times this is what the learning maximises."""
        return 1.0 if self.better == "higher" else -1.0


class BehaviourModelSpec(Strict):
    """Model of usual care: the probability of each action given the state."""

    kind: Literal["multinomial_logit", "gradient_boosting"] = Field(
        "multinomial_logit",
        description="multinomial_logit (statsmodels MNLogit) or gradient_boosting (histogram gradient boosting)",
    )
    include_step: Flag = Field(True, description="add the decision index as a covariate")
    max_iterations: Annotated[WholeNumber, Field(ge=10, le=1000)] = Field(
        100, description="optimiser iterations (multinomial_logit) or boosting rounds (gradient_boosting)"
    )
    spline_states: Annotated[list[Identifier], Field(max_length=50)] = Field(
        [], description="non-binary states entered as natural cubic splines (multinomial_logit only)"
    )
    spline_df: Annotated[WholeNumber, Field(ge=3, le=10)] = Field(4, description="degrees of freedom of each spline")
    terms: Annotated[list[ModelTerm], Field(max_length=100)] = Field(
        [],
        description="extra terms beside every state's main effect (multinomial_logit only): {state: NAME, power: 2 "
        "or 3}, {spline: NAME, df: 4}, {interaction: [NAME, NAME]}",
    )
    floor_mixture: Flag = Field(
        False,
        description="multinomial_logit only: mix the logit with a share of decisions spread evenly over the actions "
        "taken in the records, the share estimated with the coefficients by maximum likelihood (Copas 1988), for "
        "usual care that takes every action now and then whatever the state",
    )
    folds: Annotated[WholeNumber, Field(ge=1, le=20)] = Field(
        5,
        description="cross-fitting folds, split by patient; records get out-of-fold probabilities. 1 = no "
        "cross-fitting (in-sample probabilities), allowed only for the parametric multinomial_logit",
    )
    probability_floor: Annotated[float, Field(ge=0.0, le=0.05), FINITE, NOT_BOOLEAN] = Field(
        0.001, description="every action's estimated probability is raised to at least this (rows still sum to 1)"
    )
    truncation_percentiles: tuple[Number, Number] = Field(
        (1.0, 99.0), description="[low, high] percentiles at which weights are truncated in the diagnostics"
    )

    @property
    def term_labels(self) -> list[str]:
        return [t.label for t in self.terms]

    @model_validator(mode="after")
    def _percentiles_ordered(self) -> BehaviourModelSpec:
        low, high = self.truncation_percentiles
        if not 0.0 <= low < high <= 100.0:
            raise ValueError(f"truncation_percentiles must satisfy 0 <= low < high <= 100, got [{low}, {high}]")
        if self.folds == 1 and self.kind == "gradient_boosting":
            raise ValueError("gradient_boosting must be cross-fitted: set behaviour_model.folds to 2 or more")
        if self.floor_mixture and self.kind == "gradient_boosting":
            raise ValueError(
                "behaviour_model.floor_mixture applies to the multinomial_logit model (boosted trees can learn a "
                "floor of their own); remove it or use kind: multinomial_logit"
            )
        if self.terms and self.kind == "gradient_boosting":
            raise ValueError(
                "behaviour_model.terms apply to the multinomial_logit model (boosted trees find their own "
                "interactions); remove the terms or use kind: multinomial_logit"
            )
        return self


class QModelSpec(Strict):
    """Model of the action-value function at each decision point."""

    kind: Literal["linear", "gradient_boosting"] = Field(
        "linear",
        description="linear: least squares with action-by-state interactions; gradient_boosting: "
        "scikit-learn histogram gradient boosting with the action encoded as features",
    )
    basis: Literal["linear", "quadratic", "cubic"] = Field(
        "linear",
        description="quadratic adds the square of every non-binary state to the covariates; cubic "
        "adds the square and the cube",
    )
    terms: Annotated[list[ModelTerm], Field(max_length=100)] = Field(
        [],
        description="extra terms of the linear Q-model (and of the evaluation's outcome models) beside every state's "
        "main effect and the basis powers: {state: NAME, power: 2 or 3}, {spline: NAME, df: 4} (in place of the "
        "state's main effect), {interaction: [NAME, NAME]}",
    )
    action_slopes: Literal["separate", "shared"] = Field(
        "separate",
        description="separate: every action has its own coefficients on every term (one least-squares fit per "
        "decision point and action); shared: one fit per decision point with an intercept per action and slopes "
        "common to all actions, except on the action_interactions",
    )
    action_interactions: Annotated[list[Identifier | ModelTerm], Field(max_length=100)] = Field(
        [],
        description="with action_slopes: shared, the states (their main effects) and terms whose slopes differ by "
        "action",
    )
    ridge_alpha: Annotated[float, Field(ge=0.0, le=1e6), FINITE, NOT_BOOLEAN] | Literal["cv"] = Field(
        0.0,
        description="ridge penalty of the linear Q-model, or 'cv' to choose it from ridge_grid by "
        "cross-validation with folds by patient",
    )
    ridge_grid: Annotated[
        list[Annotated[float, Field(ge=0.0, le=1e6), FINITE, NOT_BOOLEAN]], Field(min_length=1, max_length=30)
    ] = [
        0.0,
        0.1,
        1.0,
        10.0,
        100.0,
    ]
    cv_folds: Annotated[WholeNumber, Field(ge=2, le=20)] = Field(
        5, description="folds by patient for choosing the ridge penalty and for the out-of-fold error"
    )
    learning_mode: Literal["backward", "pooled"] = Field(
        "backward",
        description="backward: one Q-model per decision point, by backward induction; pooled: one "
        "Q-model with the decision index as a feature, iterated to the tolerance (episodes of unequal length)",
    )
    tolerance: Annotated[float, Field(gt=0.0, le=1.0), FINITE, NOT_BOOLEAN] = Field(
        1e-6, description="pooled mode stops when no regression target moves by more than this"
    )
    max_iterations: Annotated[WholeNumber, Field(ge=1, le=1000)] = Field(200, description="pooled mode iteration cap")
    boosting_max_iter: Annotated[WholeNumber, Field(ge=10, le=2000)] = Field(
        100, description="boosting rounds of each gradient boosting Q-model"
    )
    boosting_max_leaf_nodes: Annotated[WholeNumber, Field(ge=2, le=255)] = 15
    boosting_learning_rate: Annotated[float, Field(gt=0.0, le=1.0), FINITE, NOT_BOOLEAN] = 0.1
    boosting_min_samples_leaf: Annotated[WholeNumber, Field(ge=1, le=10_000)] = 50

    @property
    def term_labels(self) -> list[str]:
        return [t.label for t in self.terms]

    @property
    def interaction_labels(self) -> list[str]:
        return [term_text(t) for t in self.action_interactions]

    @property
    def degree(self) -> int:
        """The highest power ``basis`` adds to every continuous and integer state (1: none)."""
        return {"linear": 1, "quadratic": 2, "cubic": 3}[self.basis]

    @model_validator(mode="after")
    def _terms_need_linear(self) -> QModelSpec:
        if self.kind == "gradient_boosting" and (self.terms or self.action_slopes == "shared"):
            raise ValueError(
                "q_model.terms and action_slopes: shared apply to the linear Q-model (boosted trees find their own "
                "interactions); remove them or use kind: linear"
            )
        if self.action_interactions and self.action_slopes == "separate":
            raise ValueError(
                "q_model.action_interactions need action_slopes: shared (with separate slopes every term already "
                "has its own slope per action)"
            )
        return self


class StateCondition(Strict):
    """One structured condition on a state (never an expression string)."""

    state: Identifier
    comparison: Literal["below", "at_most", "above", "at_least", "in", "not_in"]
    value: Number | None = Field(None, description="threshold for below / at_most / above / at_least")
    # numbers first (a level written as 2 is the number 2 on a numeric state and the level "2" on a categorical)
    values: (
        Annotated[
            list[Annotated[Number | LevelLabel, Field(union_mode="left_to_right")]], Field(min_length=1, max_length=50)
        ]
        | None
    ) = Field(None, description="set of values for in / not_in (the levels of a categorical state)")

    @model_validator(mode="after")
    def _operand(self) -> StateCondition:
        needs_set = self.comparison in ("in", "not_in")
        if needs_set and (self.values is None or self.value is not None):
            raise ValueError(f"condition on {self.state!r}: comparison {self.comparison!r} takes 'values' (a list)")
        if not needs_set and (self.value is None or self.values is not None):
            raise ValueError(f"condition on {self.state!r}: comparison {self.comparison!r} takes 'value' (a number)")
        return self


class ClinicalRule(Strict):
    """Forbid actions at decisions where every condition holds."""

    name: Identifier
    forbid: Annotated[list[Identifier], Field(min_length=1)] = Field(description="action labels forbidden")
    when: Annotated[list[StateCondition], Field(min_length=1, max_length=10)] = Field(
        description="conditions that must all hold for the rule to apply"
    )
    reason: Annotated[FreeText, Field(max_length=300)] = ""


class Constraints(Strict):
    """Safeguards on the learned regime."""

    support_threshold: Probability = Field(
        0.05, description="an action may be recommended only if usual care's estimated probability is at least this"
    )
    clinical_rules: Annotated[list[ClinicalRule], Field(max_length=100)] = []
    max_intensity_change: Annotated[WholeNumber, Field(ge=0, le=10)] | None = Field(
        None, description="forbid actions whose |intensity| exceeds this (every action then needs an intensity)"
    )
    pessimism: Annotated[float, Field(ge=0.0, le=10.0), FINITE, NOT_BOOLEAN] = Field(
        0.0, description="k: rank actions by mean minus k standard deviations of bootstrap Q-models (0 = off)"
    )
    ensemble_size: Annotated[WholeNumber, Field(ge=2, le=200)] = Field(
        20, description="bootstrap Q-models (resampling patients) used when pessimism > 0"
    )


class EvaluationSpec(Strict):
    """Off-policy evaluation settings."""

    estimators: Annotated[list[EstimatorName], Field(min_length=1)] = ["pdwis", "wdr", "fqe"]
    fixed_strategies: Flag = Field(True, description="also evaluate 'always <action>' for every action")
    reference: Identifier = Field(
        "usual_care",
        description="the regime every pairwise contrast is taken against (the second of each pair, as regime minus "
        "reference): usual_care, learned, always_<action> or a comparator's name; the headline, the strategies' "
        "table, survival and sensitivity stay against usual care",
    )
    cross_fit_folds: Annotated[WholeNumber, Field(ge=1, le=10)] = Field(
        2,
        description="the learned regime is evaluated by K-fold cross-fitting by patient: each patient's records "
        "are scored with the regime learned from the other folds; 1 = evaluate on the records the regime was "
        "learned from (optimistic)",
    )
    fqe_ridge_alpha: Annotated[float, Field(ge=0.0, le=1e6), FINITE, NOT_BOOLEAN] = Field(
        1.0,
        description="ridge penalty of the fitted-Q evaluation models (fqe, and the Q̂ of dr and wdr) on the "
        "standardised state features; a small penalty keeps an evaluation model from extrapolating wildly where the "
        "regime's action is rare in the records; 0 = plain least squares",
    )
    replicates: Annotated[WholeNumber, Field(ge=0, le=100_000)] = Field(
        200, description="bootstrap replicates (patients resampled, the evaluation's models refitted); 0 = no intervals"
    )
    bootstrap_regime: Literal["fixed", "refit"] = Field(
        "fixed",
        description="fixed: every replicate keeps the regime learned from the records (each patient copy scored "
        "by its original fold's regime, patients resampled within their cross-fitting folds) and refits usual care "
        "and the outcome models: intervals for the value of the regime actually learned, the target the report "
        "states; refit: every replicate learns the regime again, so its intervals mix in the variability of "
        "learning, and a regime learned from a resample (duplicated patients) is typically worse than the one "
        "learned from the records, which pulls the replicates below the estimate",
    )
    shards: Annotated[WholeNumber, Field(ge=1, le=1000)] = Field(
        4, description="bootstrap replicates are split into this many separate workflow jobs"
    )
    interval_level: Annotated[float, Field(ge=0.5, le=0.999), FINITE, NOT_BOOLEAN] = Field(
        0.95, description="bootstrap interval level"
    )
    interval_method: Literal["percentile", "basic"] = Field(
        "percentile",
        description="percentile, or basic (2·estimate − quantiles: corrects the bootstrap's estimated "
        "bias, e.g. the optimism of evaluating a regime on the records it was learned from)",
    )
    minimum_ess_fraction: Probability = Field(
        0.05, description="an estimate whose effective sample size is below this share of episodes is unreliable"
    )
    minimum_ess: Annotated[float, Field(ge=30.0), FINITE, NOT_BOOLEAN] = Field(
        30.0, description="absolute floor of the reliable effective sample size (never below 30)"
    )
    unidentified_share: Probability = Field(
        0.5,
        description="a regime whose actions lie below the support threshold at more than this share of decisions "
        "is 'not identified': its value gets no interval, no plot point and no headline",
    )
    m_out_of_n: Flag = Field(
        False, description="adaptive m-out-of-n bootstrap (Chakraborty, Laber & Zhao 2013) for near-tied actions"
    )
    m_out_of_n_alpha: Annotated[float, Field(gt=0.0, le=10.0), FINITE, NOT_BOOLEAN] = Field(
        0.1, description="alpha of the adaptive m-out-of-n resample size m = n^((1 + alpha (1 - p)) / (1 + alpha))"
    )

    @model_validator(mode="after")
    def _unique(self) -> EvaluationSpec:
        if len(set(self.estimators)) != len(self.estimators):
            raise ValueError("evaluation.estimators lists an estimator twice")
        if self.replicates and self.shards > self.replicates:
            raise ValueError(f"evaluation.shards ({self.shards}) exceeds evaluation.replicates ({self.replicates})")
        if self.m_out_of_n and self.bootstrap_regime == "fixed":
            raise ValueError(
                "evaluation.m_out_of_n resamples for the non-smooth learning of the regime; with "
                "bootstrap_regime: fixed nothing is learned in the replicates: set bootstrap_regime: refit or "
                "m_out_of_n: false"
            )
        return self


class SensitivitySpec(Strict):
    """Sensitivity of the learned-minus-usual-care contrast to unmeasured confounding (marginal sensitivity model)."""

    gammas: Annotated[
        list[Annotated[float, Field(ge=1.0, le=50.0), FINITE, NOT_BOOLEAN]], Field(min_length=1, max_length=30)
    ] = Field([1.0, 1.25, 1.5, 2.0, 3.0], description="confounding strengths Γ shown in the report's table")
    gamma_max: Annotated[float, Field(gt=1.0, le=50.0), FINITE, NOT_BOOLEAN] = Field(
        5.0, description="largest Γ searched for the tipping point"
    )
    precision: Annotated[float, Field(gt=0.0, le=0.5), FINITE, NOT_BOOLEAN] = Field(
        0.02, description="the tipping point is found to this precision in Γ"
    )
    confounded_decisions: (
        Literal["all", "first"] | Annotated[list[Annotated[WholeNumber, Field(ge=0)]], Field(min_length=1)]
    ) = Field("all", description="decisions a hidden confounder may affect: all, the first, or a list of steps")

    @model_validator(mode="after")
    def _grid_fits(self) -> SensitivitySpec:
        if max(self.gammas) > self.gamma_max:
            raise ValueError(f"sensitivity.gammas must not exceed gamma_max ({self.gamma_max})")
        if (self.gamma_max - 1.0) / self.precision > 5000:
            raise ValueError("sensitivity.precision is too fine for gamma_max: at most 5000 grid points")
        return self


class ReportSpec(Strict):
    """Report settings."""

    min_cell_count: Annotated[WholeNumber, Field(ge=1, le=1000)] = Field(
        11, description="counts from 1 to min_cell_count - 1 are shown as '<min_cell_count'"
    )


class AnalysisSpec(Strict):
    """What the study does: learn a regime and compare it, or only compare the strategies the protocol names."""

    learn_regime: Flag = Field(
        True,
        description="false: no regime is learned; the study values usual care, the fixed strategies and the "
        "comparators and contrasts them (no strategies section, no sweeps)",
    )
    headline: Identifier | None = Field(
        None,
        description="with learn_regime: false, the named strategy the headline reports against usual care "
        "(always_<action> or a comparator's name; default: the only comparator when there is exactly one)",
    )


class SurvivalSpec(Strict):
    """Survival under each strategy by clone–censor–weight (Cain et al. 2010; Hernán 2018; Maringe et al. 2020)."""

    horizon_days: Annotated[float, Field(gt=0.0, le=36525.0), FINITE, NOT_BOOLEAN] = Field(
        description="end of follow-up in days from time zero (the index date, day 0)"
    )
    time_points: Annotated[list[Annotated[float, Field(gt=0.0), FINITE, NOT_BOOLEAN]], Field(max_length=20)] = Field(
        [], description="days at which the table shows survival, risk and contrasts (the horizon is always shown)"
    )
    grid_days: Annotated[float, Field(gt=0.0, le=36525.0), FINITE, NOT_BOOLEAN] | None = Field(
        None, description="spacing of the curves' time grid in days; default: the median gap between decisions"
    )
    grace: Annotated[WholeNumber, Field(ge=0, le=100)] = Field(
        0, description="decision points during which a clone follows usual care before the strategy binds"
    )
    dropout_model: Flag = Field(
        True,
        description="weight by the inverse probability of remaining in follow-up (pooled logistic on the "
        "states); false assumes loss to follow-up is unrelated to the outcome",
    )
    weight_truncation: (
        Annotated[
            list[Annotated[float, Field(ge=0.0, le=100.0), FINITE, NOT_BOOLEAN]], Field(min_length=2, max_length=2)
        ]
        | None
    ) = Field(None, description="percentiles [low, high] at which clone weights are truncated (a sensitivity check)")
    cox: Flag = Field(
        False,
        description="also fit a weighted Cox model of each strategy against usual care (a hazard ratio is not a "
        "causal contrast over time; the risk difference stays the headline)",
    )

    @model_validator(mode="after")
    def _points_inside(self) -> SurvivalSpec:
        outside = [t for t in self.time_points if t > self.horizon_days]
        if outside:
            raise ValueError(f"survival.time_points: {outside[0]:g} lies beyond horizon_days ({self.horizon_days:g})")
        if len(set(self.time_points)) != len(self.time_points):
            raise ValueError("survival.time_points lists a day twice")
        if self.weight_truncation is not None and not self.weight_truncation[0] < self.weight_truncation[1]:
            raise ValueError("survival.weight_truncation must be [low, high] with low < high")
        return self


# Settings a specification sweep may vary (axis name = the setting's place in the protocol), in grid order.
# Weight truncation is swept through behaviour_model.probability_floor, which caps every inverse probability at
# 1/floor; behaviour_model.truncation_percentiles only changes diagnostics, never an estimate.
SWEEP_AXES = (
    "constraints.support_threshold",
    "behaviour_model.kind",
    "behaviour_model.probability_floor",
    "q_model.kind",
    "q_model.basis",
    "q_model.learning_mode",
    "constraints.pessimism",
)


MAX_SPECIFICATIONS = 100


class SelfCheckSpec(Strict):
    """The self-check: the analysis rerun on cohorts simulated from a look-alike world fitted to the records
    (plasmode simulation; Franklin et al. 2014), to measure its bias and interval coverage on records like these."""

    cohorts: Annotated[WholeNumber, Field(ge=2, le=1000)] = Field(
        50, description="simulated cohorts, each of as many episodes as the records"
    )
    replicates: Annotated[WholeNumber, Field(ge=20, le=1000)] = Field(
        50,
        description="bootstrap replicates per simulated cohort (may be fewer than evaluation.replicates; the "
        "self-check's page states both)",
    )
    truth_episodes: Annotated[WholeNumber, Field(ge=1000, le=1_000_000)] = Field(
        100_000, description="simulated episodes per policy for each cohort's truths (common random numbers)"
    )
    reference_episodes: Annotated[WholeNumber, Field(ge=1000, le=1_000_000)] = Field(
        100_000,
        description="simulated episodes the reference rule is learned from (the learned regime's regret is measured "
        "against it)",
    )
    confounder_gamma: Annotated[float, Field(ge=1.0, le=50.0), FINITE, NOT_BOOLEAN] = Field(
        1.0,
        description="strength Γ of a hidden confounder built into the look-alike world at the decisions "
        "sensitivity.confounded_decisions names (1: none; at most sensitivity.gamma_max): the self-check then also "
        "checks the sensitivity bounds at Γ against the truth",
    )


def confounder_problem(gamma: float, sensitivity: SensitivitySpec, learn_regime: bool) -> str | None:
    """Why a hidden confounder of strength ``gamma`` cannot be built into the self-check's world for this protocol
    (None when it can): the bounds are computed up to ``sensitivity.gamma_max`` only, and the self-check's truths
    are those of the learned regime and its strategies."""
    if gamma > sensitivity.gamma_max:
        return f"must not exceed sensitivity.gamma_max ({sensitivity.gamma_max:g})"
    if gamma > 1.0 and not learn_regime:
        return "needs analysis.learn_regime: true (the self-check's truths are the learned regime's)"
    return None


class SweepSpec(Strict):
    """Specification sweep: the learned-minus-usual-care contrast recomputed under alternative analysis choices."""

    axes: Annotated[
        dict[Literal[SWEEP_AXES], Annotated[list[WholeNumber | Number | str], Field(min_length=1, max_length=20)]],
        Field(min_length=1),
    ] = Field(description="setting -> values to try; every combination is one specification (one workflow job)")
    replicates: Annotated[WholeNumber, Field(ge=2, le=10_000)] = Field(
        50, description="patient-bootstrap replicates per specification (refitted as evaluation.bootstrap_regime says)"
    )
    gammas: Annotated[
        list[Annotated[float, Field(ge=1.0, le=50.0), FINITE, NOT_BOOLEAN]], Field(min_length=1, max_length=10)
    ] = Field([1.0, 1.25, 1.5, 2.0, 3.0], description="Γ values at which each specification's bounds are shown")
