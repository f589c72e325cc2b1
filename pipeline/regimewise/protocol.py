"""The research protocol: one YAML file, validated by a pydantic model with unknown keys forbidden.

Every setting a stage reads lives here, with its constraint in its type. Paths inside the protocol resolve
relative to the protocol file. ``config/protocol.schema.json`` is exported from :class:`Protocol` by
:func:`export_schema` and never edited by hand.

Clinical rules and reward definitions are structured data, never expression strings: nothing in a protocol is
ever evaluated as code.
"""

from __future__ import annotations

import hashlib
import itertools
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Literal

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from .errors import ProtocolError

# ---------------------------------------------------------------------------------------------- reusable types
Identifier = Annotated[
    str,
    Field(pattern=r"^[a-z][a-z0-9_]{0,39}$", description="lower-case letters, digits and _, starting with a letter"),
]
ColumnName = Annotated[str, Field(min_length=1, max_length=128)]
ShortText = Annotated[str, Field(min_length=1, max_length=300)]
LongText = Annotated[str, Field(min_length=1, max_length=4000)]
Probability = Annotated[float, Field(ge=0.0, le=1.0)]
Discount = Annotated[float, Field(gt=0.0, le=1.0)]
Seed = Annotated[int, Field(ge=0, lt=2**63)]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


# ---------------------------------------------------------------------------------------------- sections
class Study(_Strict):
    """Study metadata shown at the top of the report."""

    title: ShortText
    question: LongText
    version: Annotated[str, Field(min_length=1, max_length=40)]
    run_name: Identifier = Field(description="results go under <results>/<run_name>/ unless --out is given")


class ColumnMap(_Strict):
    """Names of the data-contract columns in the decisions file."""

    episode_id: ColumnName = "episode_id"
    patient_id: ColumnName | None = Field(
        "patient_id", description="resampling cluster; null if the file has none (each episode is its own patient)"
    )
    step: ColumnName = "step"
    day: ColumnName = "day"
    action: ColumnName = "action"
    reward: ColumnName = "reward"
    followup: ColumnName = Field("followup_days", description="episodes table: days from index to event or censoring")
    event: ColumnName = Field("event", description="episodes table: 1 event observed, 0 censored")


class AcknowledgedColumn(_Strict):
    """A column whose name or values look like an identifier, kept on purpose with a written justification."""

    column: ColumnName
    justification: Annotated[str, Field(min_length=20, max_length=1000)] = Field(
        description="why this column is not a direct identifier (recorded in the report)"
    )


MissingPolicy = Literal["refuse", "drop", "carry_forward", "indicator"]


class DataSpec(_Strict):
    """Where the records are and how their columns are named."""

    decisions: ColumnName = Field(description="decisions table (CSV or Parquet), relative to the protocol file")
    episodes: ColumnName | None = Field(None, description="optional episodes table, relative to the protocol file")
    root: ColumnName = Field(
        ".", description="folder the record paths must stay inside, relative to the protocol file"
    )
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


class StateVariable(_Strict):
    """One state variable observed at every decision point."""

    name: Identifier
    column: ColumnName | None = Field(None, description="column in the decisions file; defaults to name")
    label: ShortText
    kind: Literal["continuous", "integer", "binary"]
    unit: Annotated[str, Field(max_length=40)] = ""
    plausible_range: tuple[float, float] = Field(description="[low, high]; values outside are refused")

    @model_validator(mode="after")
    def _range_ordered(self) -> StateVariable:
        low, high = self.plausible_range
        if not low < high:
            raise ValueError(f"plausible_range of {self.name!r} must have low < high, got [{low}, {high}]")
        if self.kind == "binary" and (low, high) != (0.0, 1.0):
            raise ValueError(f"binary state {self.name!r} must have plausible_range [0, 1]")
        return self

    @property
    def source_column(self) -> str:
        return self.column or self.name


class Action(_Strict):
    """One label of the action set."""

    label: Identifier
    description: ShortText
    intensity: Annotated[int, Field(ge=-10, le=10)] | None = Field(
        None, description="ordinal change in therapy intensity this action makes (e.g. -1 step down, 0 hold, +1 "
        "step up); needed only for constraints.max_intensity_change"
    )


class RewardSpec(_Strict):
    """The reward is the decisions file's reward column, observed after the action; larger is better."""

    description: LongText


class BehaviourModelSpec(_Strict):
    """Model of usual care: the probability of each action given the state."""

    kind: Literal["multinomial_logit", "gradient_boosting"] = Field(
        "multinomial_logit",
        description="multinomial_logit (statsmodels MNLogit) or gradient_boosting (histogram gradient boosting)",
    )
    include_step: bool = Field(True, description="add the decision index as a covariate")
    max_iterations: Annotated[int, Field(ge=10, le=1000)] = Field(
        100, description="optimiser iterations (multinomial_logit) or boosting rounds (gradient_boosting)"
    )
    spline_states: Annotated[list[Identifier], Field(max_length=50)] = Field(
        [], description="non-binary states entered as natural cubic splines (multinomial_logit only)"
    )
    spline_df: Annotated[int, Field(ge=3, le=10)] = Field(4, description="degrees of freedom of each spline")
    folds: Annotated[int, Field(ge=1, le=20)] = Field(
        5,
        description="cross-fitting folds, split by patient; records get out-of-fold probabilities. 1 = no "
        "cross-fitting (in-sample probabilities), allowed only for the parametric multinomial_logit",
    )
    probability_floor: Annotated[float, Field(ge=0.0, le=0.05)] = Field(
        0.001, description="every action's estimated probability is raised to at least this (rows still sum to 1)"
    )
    truncation_percentiles: tuple[float, float] = Field(
        (1.0, 99.0), description="[low, high] percentiles at which weights are truncated in the diagnostics"
    )

    @model_validator(mode="after")
    def _percentiles_ordered(self) -> BehaviourModelSpec:
        low, high = self.truncation_percentiles
        if not 0.0 <= low < high <= 100.0:
            raise ValueError(f"truncation_percentiles must satisfy 0 <= low < high <= 100, got [{low}, {high}]")
        if self.folds == 1 and self.kind == "gradient_boosting":
            raise ValueError("gradient_boosting must be cross-fitted: set behaviour_model.folds to 2 or more")
        return self


class QModelSpec(_Strict):
    """Model of the action-value function at each decision point."""

    kind: Literal["linear", "gradient_boosting"] = Field(
        "linear", description="linear: least squares with action-by-state interactions; gradient_boosting: "
        "scikit-learn histogram gradient boosting with the action encoded as features"
    )
    basis: Literal["linear", "quadratic", "cubic"] = Field(
        "linear", description="quadratic adds the square of every non-binary state to the covariates; cubic "
        "adds the square and the cube"
    )
    ridge_alpha: Annotated[float, Field(ge=0.0, le=1e6)] | Literal["cv"] = Field(
        0.0, description="ridge penalty of the linear Q-model, or 'cv' to choose it from ridge_grid by "
        "cross-validation with folds by patient"
    )
    ridge_grid: Annotated[list[Annotated[float, Field(ge=0.0, le=1e6)]], Field(min_length=1, max_length=30)] = [
        0.0, 0.1, 1.0, 10.0, 100.0
    ]
    cv_folds: Annotated[int, Field(ge=2, le=20)] = Field(
        5, description="folds by patient for choosing the ridge penalty and for the out-of-fold error"
    )
    learning_mode: Literal["backward", "pooled"] = Field(
        "backward", description="backward: one Q-model per decision point, by backward induction; pooled: one "
        "Q-model with the decision index as a feature, iterated to the tolerance (episodes of unequal length)"
    )
    tolerance: Annotated[float, Field(gt=0.0, le=1.0)] = Field(
        1e-6, description="pooled mode stops when no regression target moves by more than this"
    )
    max_iterations: Annotated[int, Field(ge=1, le=1000)] = Field(200, description="pooled mode iteration cap")
    boosting_max_iter: Annotated[int, Field(ge=10, le=2000)] = Field(
        100, description="boosting rounds of each gradient boosting Q-model"
    )
    boosting_max_leaf_nodes: Annotated[int, Field(ge=2, le=255)] = 15
    boosting_learning_rate: Annotated[float, Field(gt=0.0, le=1.0)] = 0.1
    boosting_min_samples_leaf: Annotated[int, Field(ge=1, le=10_000)] = 50


class StateCondition(_Strict):
    """One structured condition on a state (never an expression string)."""

    state: Identifier
    comparison: Literal["below", "at_most", "above", "at_least", "in", "not_in"]
    value: float | None = Field(None, description="threshold for below / at_most / above / at_least")
    values: Annotated[list[float], Field(min_length=1, max_length=50)] | None = Field(
        None, description="set of values for in / not_in"
    )

    @model_validator(mode="after")
    def _operand(self) -> StateCondition:
        needs_set = self.comparison in ("in", "not_in")
        if needs_set and (self.values is None or self.value is not None):
            raise ValueError(f"condition on {self.state!r}: comparison {self.comparison!r} takes 'values' (a list)")
        if not needs_set and (self.value is None or self.values is not None):
            raise ValueError(f"condition on {self.state!r}: comparison {self.comparison!r} takes 'value' (a number)")
        return self


class ClinicalRule(_Strict):
    """Forbid actions at decisions where every condition holds."""

    name: Identifier
    forbid: Annotated[list[Identifier], Field(min_length=1)] = Field(description="action labels forbidden")
    when: Annotated[list[StateCondition], Field(min_length=1, max_length=10)] = Field(
        description="conditions that must all hold for the rule to apply"
    )
    reason: Annotated[str, Field(max_length=300)] = ""


class Constraints(_Strict):
    """Safeguards on the learned regime."""

    support_threshold: Probability = Field(
        0.05, description="an action may be recommended only if usual care's estimated probability is at least this"
    )
    clinical_rules: Annotated[list[ClinicalRule], Field(max_length=100)] = []
    max_intensity_change: Annotated[int, Field(ge=0, le=10)] | None = Field(
        None, description="forbid actions whose |intensity| exceeds this (every action then needs an intensity)"
    )
    pessimism: Annotated[float, Field(ge=0.0, le=10.0)] = Field(
        0.0, description="k: rank actions by mean minus k standard deviations of bootstrap Q-models (0 = off)"
    )
    ensemble_size: Annotated[int, Field(ge=2, le=200)] = Field(
        20, description="bootstrap Q-models (resampling patients) used when pessimism > 0"
    )


class EvaluationSpec(_Strict):
    """Off-policy evaluation settings."""

    estimators: Annotated[
        list[Literal["is", "wis", "pdis", "pdwis", "dr", "wdr", "fqe"]], Field(min_length=1)
    ] = ["pdwis", "wdr", "fqe"]
    fixed_strategies: bool = Field(True, description="also evaluate 'always <action>' for every action")
    cross_fit_folds: Annotated[int, Field(ge=1, le=10)] = Field(
        2, description="the learned regime is evaluated by K-fold cross-fitting by patient: each patient's records "
        "are scored with the regime learned from the other folds; 1 = evaluate on the records the regime was "
        "learned from (optimistic)"
    )
    fqe_ridge_alpha: Annotated[float, Field(ge=0.0, le=1e6)] = Field(
        1.0, description="ridge penalty of the fitted-Q evaluation models (fqe, and the Q̂ of dr and wdr) on the "
        "standardised state features; a small penalty keeps an evaluation model from extrapolating wildly where the "
        "regime's action is rare in the records; 0 = plain least squares"
    )
    replicates: Annotated[int, Field(ge=0, le=100_000)] = Field(
        200, description="bootstrap replicates (patients resampled, all models refitted); 0 = no intervals"
    )
    shards: Annotated[int, Field(ge=1, le=1000)] = Field(
        4, description="bootstrap replicates are split into this many separate workflow jobs"
    )
    interval_level: Annotated[float, Field(ge=0.5, le=0.999)] = Field(0.95, description="bootstrap interval level")
    interval_method: Literal["percentile", "basic"] = Field(
        "percentile", description="percentile, or basic (2·estimate − quantiles: corrects the bootstrap's estimated "
        "bias, e.g. the optimism of evaluating a regime on the records it was learned from)"
    )
    minimum_ess_fraction: Probability = Field(
        0.05, description="an estimate whose effective sample size is below this share of episodes is unreliable"
    )
    minimum_ess: Annotated[float, Field(ge=30.0)] = Field(
        30.0, description="absolute floor of the reliable effective sample size (never below 30)"
    )
    m_out_of_n: bool = Field(
        False, description="adaptive m-out-of-n bootstrap (Chakraborty, Laber & Zhao 2013) for near-tied actions"
    )
    m_out_of_n_alpha: Annotated[float, Field(gt=0.0, le=10.0)] = Field(
        0.1, description="alpha of the adaptive m-out-of-n resample size m = n^((1 + alpha (1 - p)) / (1 + alpha))"
    )

    @model_validator(mode="after")
    def _unique(self) -> EvaluationSpec:
        if len(set(self.estimators)) != len(self.estimators):
            raise ValueError("evaluation.estimators lists an estimator twice")
        if self.replicates and self.shards > self.replicates:
            raise ValueError(f"evaluation.shards ({self.shards}) exceeds evaluation.replicates ({self.replicates})")
        return self


class SensitivitySpec(_Strict):
    """Sensitivity of the learned-minus-usual-care contrast to unmeasured confounding (marginal sensitivity model)."""

    gammas: Annotated[list[Annotated[float, Field(ge=1.0, le=50.0)]], Field(min_length=1, max_length=30)] = Field(
        [1.0, 1.25, 1.5, 2.0, 3.0], description="confounding strengths Γ shown in the report's table"
    )
    gamma_max: Annotated[float, Field(gt=1.0, le=50.0)] = Field(
        5.0, description="largest Γ searched for the tipping point"
    )
    precision: Annotated[float, Field(gt=0.0, le=0.5)] = Field(
        0.02, description="the tipping point is found to this precision in Γ"
    )
    confounded_decisions: Literal["all", "first"] | Annotated[list[Annotated[int, Field(ge=0)]], Field(min_length=1)] = (
        Field("all", description="decisions a hidden confounder may affect: all, the first, or a list of steps")
    )

    @model_validator(mode="after")
    def _grid_fits(self) -> SensitivitySpec:
        if max(self.gammas) > self.gamma_max:
            raise ValueError(f"sensitivity.gammas must not exceed gamma_max ({self.gamma_max})")
        if (self.gamma_max - 1.0) / self.precision > 5000:
            raise ValueError("sensitivity.precision is too fine for gamma_max: at most 5000 grid points")
        return self


class ReportSpec(_Strict):
    """Report settings."""

    min_cell_count: Annotated[int, Field(ge=1, le=1000)] = Field(
        11, description="counts from 1 to min_cell_count - 1 are shown as '<min_cell_count'"
    )


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


class SweepSpec(_Strict):
    """Specification sweep: the learned-minus-usual-care contrast recomputed under alternative analysis choices."""

    axes: Annotated[
        dict[Literal[SWEEP_AXES], Annotated[list[int | float | str], Field(min_length=1, max_length=20)]],
        Field(min_length=1),
    ] = Field(description="setting -> values to try; every combination is one specification (one workflow job)")
    replicates: Annotated[int, Field(ge=2, le=10_000)] = Field(
        50, description="patient-bootstrap replicates per specification (every model refitted in each)"
    )
    gammas: Annotated[list[Annotated[float, Field(ge=1.0, le=50.0)]], Field(min_length=1, max_length=10)] = Field(
        [1.0, 1.25, 1.5, 2.0, 3.0], description="Γ values at which each specification's bounds are shown"
    )


class Protocol(_Strict):
    """A regimewise research protocol."""

    study: Study
    data: DataSpec
    states: Annotated[list[StateVariable], Field(min_length=1, max_length=200)]
    actions: Annotated[list[Action], Field(min_length=2, max_length=20)]
    reward: RewardSpec
    horizon: Annotated[int, Field(ge=1, le=200, description="number of decision points per episode at most")]
    discount: Discount = 1.0
    behaviour_model: BehaviourModelSpec = BehaviourModelSpec()
    q_model: QModelSpec = QModelSpec()
    constraints: Constraints = Constraints()
    evaluation: EvaluationSpec = EvaluationSpec()
    sensitivity: SensitivitySpec = SensitivitySpec()
    seed: Seed
    report: ReportSpec = ReportSpec()
    sweeps: SweepSpec | None = Field(None, description="optional specification sweep (none: no sweep jobs)")

    @model_validator(mode="after")
    def _names_unique(self) -> Protocol:
        _refuse_repeats([s.name for s in self.states], "states", "state name")
        _refuse_repeats([s.source_column for s in self.states], "states", "state column")
        _refuse_repeats([a.label for a in self.actions], "actions", "action label")
        contract = {c for c in self.data.columns.model_dump().values() if c is not None}
        clash = sorted(contract & {s.source_column for s in self.states})
        if clash:
            raise ValueError(f"state column {clash[0]!r} is also a data-contract column in data.columns")
        unknown = sorted(set(self.data.missing) - set(self.state_names))
        if unknown:
            raise ValueError(f"data.missing names {unknown[0]!r}, which is not a declared state")
        _refuse_repeats([a.column for a in self.data.acknowledged_columns], "data.acknowledged_columns", "column")
        return self

    @model_validator(mode="after")
    def _spline_states_numeric(self) -> Protocol:
        kinds = {s.name: s.kind for s in self.states}
        for name in self.behaviour_model.spline_states:
            if kinds.get(name) in (None, "binary"):
                raise ValueError(f"behaviour_model.spline_states: {name!r} is not a declared non-binary state")
        return self

    @model_validator(mode="after")
    def _constraints_refer_to_protocol(self) -> Protocol:
        states, labels = set(self.state_names), set(self.action_labels)
        _refuse_repeats([r.name for r in self.constraints.clinical_rules], "constraints", "clinical rule name")
        for rule in self.constraints.clinical_rules:
            unknown = sorted(set(rule.forbid) - labels) or sorted({c.state for c in rule.when} - states)
            if unknown:
                raise ValueError(f"clinical rule {rule.name!r} names {unknown[0]!r}: not a declared action or state")
        if self.constraints.max_intensity_change is not None:
            missing = [a.label for a in self.actions if a.intensity is None]
            if missing:
                raise ValueError(f"max_intensity_change needs an intensity on every action; {missing[0]!r} has none")
        return self

    @model_validator(mode="after")
    def _sweep_grid_valid(self) -> Protocol:
        if self.sweeps is not None:
            if max(self.sweeps.gammas) > self.sensitivity.gamma_max:
                raise ValueError(f"sweeps.gammas must not exceed sensitivity.gamma_max ({self.sensitivity.gamma_max})")
            sweep_specifications(self)
        return self

    @property
    def action_labels(self) -> tuple[str, ...]:
        return tuple(a.label for a in self.actions)

    @property
    def state_names(self) -> tuple[str, ...]:
        return tuple(s.name for s in self.states)


def _refuse_repeats(values, section, what):
    seen = set()
    for v in values:
        if v in seen:
            raise ValueError(f"{section}: {what} {v!r} is declared twice")
        seen.add(v)


# ---------------------------------------------------------------------------------------------- sweeps
@dataclass(frozen=True)
class Specification:
    """One specification of a sweep: its id, the swept settings and the whole protocol it analyses with.

    ``prespecified`` marks the protocol's own settings (always ``spec_00``); ``in_grid`` says whether that
    combination is also one of the axes' combinations (otherwise it was added to the grid).
    """

    id: str
    index: int
    settings: dict
    prespecified: bool
    in_grid: bool
    protocol: Protocol


def sweep_specifications(protocol: Protocol) -> tuple[Specification, ...]:
    """The sweep's grid, each specification validated as a whole protocol (without ``sweeps``).

    ``spec_00`` is the pre-specified analysis (the protocol's own settings); ``spec_01``, ``spec_02``, … are the
    other combinations of the axes' values: axes in :data:`SWEEP_AXES` order, values in listed order, the last
    axis varying fastest. Raises ValueError naming the axis and value, or the combination, that is invalid.
    """
    if protocol.sweeps is None:
        return ()
    base = {**protocol.model_dump(), "sweeps": None}
    axes = [axis for axis in SWEEP_AXES if axis in protocol.sweeps.axes]
    values = [[_swept_value(base, axis, v) for v in protocol.sweeps.axes[axis]] for axis in axes]
    for axis, listed in zip(axes, values):
        if len(set(listed)) < len(listed):
            raise ValueError(f"sweeps.axes.{axis} lists a value twice; keep each value once")
    own = tuple(getattr(getattr(protocol, axis.split(".")[0]), axis.split(".")[1]) for axis in axes)
    grid = list(itertools.product(*values))
    combos = [own, *(combo for combo in grid if combo != own)]
    if len(combos) > MAX_SPECIFICATIONS:
        raise ValueError(f"sweeps.axes make {len(combos)} specifications, more than {MAX_SPECIFICATIONS}; drop values")
    out = []
    for index, combo in enumerate(combos):
        spec_id, settings = f"spec_{index:02d}", dict(zip(axes, combo))
        try:
            spec_protocol = Protocol.model_validate(_with_settings(base, settings))
        except ValidationError as err:
            shown = ", ".join(f"{axis}={value!r}" for axis, value in settings.items())
            raise ValueError(f"sweeps: combination {spec_id} ({shown}) is not a valid protocol: "
                             f"{_describe_validation_error(err)}; remove one of its values") from None  # fmt: skip
        out.append(Specification(spec_id, index, settings, index == 0, index > 0 or own in grid, spec_protocol))
    return tuple(out)


def _with_settings(base: dict, settings: dict) -> dict:
    out = dict(base)
    for axis, value in settings.items():
        section, field = axis.split(".")
        out[section] = {**out[section], field: value}
    return out


def _swept_value(base: dict, axis: str, value):
    """The value as the setting validates it, or ValueError naming the axis, the value and the constraint."""
    try:
        changed = Protocol.model_validate(_with_settings(base, {axis: value}))
    except ValidationError as err:
        raise ValueError(f"sweeps.axes.{axis}: value {value!r} is not allowed ({_describe_validation_error(err)}); "
                         "change or remove it") from None  # fmt: skip
    section, field = axis.split(".")
    return getattr(getattr(changed, section), field)


# ---------------------------------------------------------------------------------------------- loading
class _UniqueKeyLoader(yaml.SafeLoader):
    """A safe YAML loader that refuses a key repeated in one mapping (YAML would silently keep the last)."""


def _construct_unique_mapping(loader, node, deep=False):
    keys = set()
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=deep)
        if key in keys:
            raise ProtocolError(
                f"line {key_node.start_mark.line + 1}: key {key!r} appears twice in one section; keep one"
            )
        keys.add(key)
    return loader.construct_mapping(node, deep=deep)


_UniqueKeyLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_unique_mapping)


@dataclass(frozen=True)
class ProtocolFile:
    """A validated protocol together with where it came from."""

    protocol: Protocol
    path: Path
    sha256: str

    def resolve(self, relative: str) -> Path:
        """Resolve a path written in the protocol, relative to the protocol file's folder."""
        return (self.path.parent / relative).resolve()

    @property
    def decisions_path(self) -> Path:
        return self.resolve(self.protocol.data.decisions)

    @property
    def episodes_path(self) -> Path | None:
        episodes = self.protocol.data.episodes
        return None if episodes is None else self.resolve(episodes)

    def check_record_paths(self) -> None:
        """Refuse a relative record path that climbs out of ``data.root`` (absolute paths are taken as written)."""
        root = self.resolve(self.protocol.data.root)
        for key in ("decisions", "episodes"):
            written = getattr(self.protocol.data, key)
            if written is None or Path(written).is_absolute():
                continue
            if not self.resolve(written).is_relative_to(root):
                raise ProtocolError(
                    f"protocol {self.path}: data.{key} {written!r} leads outside data.root {self.protocol.data.root!r};"
                    " move the file inside that folder or widen data.root"
                )


def load_protocol(path: str | Path) -> ProtocolFile:
    """Read and validate a protocol file.

    Raises
    ------
    ProtocolError
        One line naming the file, the setting and what to change.
    """
    path = Path(path).resolve()
    if not path.is_file():
        raise ProtocolError(f"protocol file {path} not found; give the path to a protocol YAML file")
    raw = path.read_bytes()
    try:
        data = yaml.load(raw.decode("utf-8"), Loader=_UniqueKeyLoader)  # noqa: S506 - safe loader subclass
    except ProtocolError as err:
        raise ProtocolError(f"protocol {path}: {err}") from None
    except (yaml.YAMLError, UnicodeDecodeError) as err:
        raise ProtocolError(f"protocol {path}: not valid YAML ({_one_line(err)}); fix the syntax") from None
    if not isinstance(data, dict):
        raise ProtocolError(f"protocol {path}: expected a mapping of sections (study, data, states, ...)")
    try:
        protocol = Protocol.model_validate(data)
    except ValidationError as err:
        raise ProtocolError(f"protocol {path}: {_describe_validation_error(err)}") from None
    pf = ProtocolFile(protocol=protocol, path=path, sha256=hashlib.sha256(raw).hexdigest())
    pf.check_record_paths()
    return pf


def _describe_validation_error(err: ValidationError) -> str:
    problems = err.errors(include_url=False)
    first = problems[0]
    where = ".".join(str(p) for p in first["loc"]) or "(top level)"
    if first["type"] == "extra_forbidden":
        what = "unknown setting; check the spelling against config/protocol.schema.json"
    elif first["type"] == "missing":
        what = "required setting is missing"
    else:
        what = first["msg"]
        if "input" in first and not isinstance(first["input"], (dict, list)):
            what += f" (got {first['input']!r})"
    more = f" (and {len(problems) - 1} more problem{'s' if len(problems) > 2 else ''})" if len(problems) > 1 else ""
    return f"{where}: {_one_line(what)}{more}"


def _one_line(text) -> str:
    return " ".join(str(text).split())


def protocol_schema() -> dict:
    """JSON Schema of the protocol, with the ``$schema`` key Snakemake's validator needs."""
    schema = Protocol.model_json_schema()
    return {"$schema": "https://json-schema.org/draft/2020-12/schema", **schema}


def export_schema(path: str | Path) -> None:
    """Write the protocol's JSON Schema (sorted keys, two-space indent, trailing newline)."""
    Path(path).write_text(json.dumps(protocol_schema(), indent=2, sort_keys=True) + "\n", encoding="utf-8")
