"""The whole protocol (:class:`Protocol`) with its cross-section checks, and the specification sweeps it declares.

A sweep's grid is expanded here (:func:`sweep_specifications`) because the protocol's own validation must refuse
an invalid combination before any job runs.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from typing import Annotated

from pydantic import Field, ValidationError, model_validator

from regimewise.protocol.comparators import Comparator, comparator_problem
from regimewise.protocol.messages import describe_validation_error
from regimewise.protocol.sections import (
    MAX_SPECIFICATIONS,
    SWEEP_AXES,
    Action,
    AnalysisSpec,
    BehaviourModelSpec,
    Constraints,
    DataSpec,
    EvaluationSpec,
    QModelSpec,
    ReportSpec,
    RewardSpec,
    SelfCheckSpec,
    SensitivitySpec,
    StateVariable,
    Study,
    SurvivalSpec,
    SweepSpec,
    confounder_problem,
)
from regimewise.protocol.strategies import StrategiesSpec
from regimewise.protocol.terms import interactions_problem, terms_problem
from regimewise.protocol.types import Discount, Seed, Strict, WholeNumber, level_text


class Protocol(Strict):
    """A regimewise research protocol."""

    study: Study
    data: DataSpec
    states: Annotated[list[StateVariable], Field(min_length=1, max_length=200)]
    actions: Annotated[list[Action], Field(min_length=2, max_length=20)]
    reward: RewardSpec
    horizon: Annotated[WholeNumber, Field(ge=1, le=200, description="number of decision points per episode at most")]
    discount: Discount = 1.0
    behaviour_model: BehaviourModelSpec = BehaviourModelSpec()
    q_model: QModelSpec = QModelSpec()
    constraints: Constraints = Constraints()
    evaluation: EvaluationSpec = EvaluationSpec()
    sensitivity: SensitivitySpec = SensitivitySpec()
    seed: Seed
    report: ReportSpec = ReportSpec()
    sweeps: SweepSpec | None = Field(None, description="optional specification sweep (none: no sweep jobs)")
    survival: SurvivalSpec | None = Field(
        None, description="optional survival under each strategy (needs data.episodes)"
    )
    strategies: StrategiesSpec | None = Field(
        None, description="strategies derived from the learned regime (none: only the regime and fixed strategies)"
    )
    comparators: Annotated[list[Comparator], Field(max_length=20)] = Field(
        [],
        description="strategies the protocol names, such as a guideline rule: ordered rules (conditions -> action) "
        "and a default action, each evaluated, bootstrapped and (with survival) followed like the fixed strategies",
    )
    analysis: AnalysisSpec = AnalysisSpec()
    selfcheck: SelfCheckSpec | None = Field(
        None,
        description="optional self-check on look-alike cohorts: one workflow job per cohort and report section 6c; "
        "also the defaults of `regimewise selfcheck` (none: no self-check in the workflow)",
    )

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
        for s in self.states:
            if s.kind == "categorical" and self.data.missing.get(s.name) == "indicator":
                raise ValueError(
                    f"data.missing: indicator fills with the median, which categorical state {s.name!r} has not; "
                    "use refuse, drop or carry_forward"
                )
        _refuse_repeats([a.column for a in self.data.acknowledged_columns], "data.acknowledged_columns", "column")
        return self

    @model_validator(mode="after")
    def _spline_states_numeric(self) -> Protocol:
        kinds = {s.name: s.kind for s in self.states}
        for name in self.behaviour_model.spline_states:
            if kinds.get(name) in (None, "binary", "categorical"):
                raise ValueError(
                    f"behaviour_model.spline_states: {name!r} is not a declared continuous or integer state"
                )
        return self

    @model_validator(mode="after")
    def _terms_fit_states(self) -> Protocol:
        b, q = self.behaviour_model, self.q_model
        problem = terms_problem("behaviour_model.terms", b.terms, self.states, splines=b.spline_states)
        problem = problem or terms_problem("q_model.terms", q.terms, self.states, basis_degree=q.degree)
        problem = problem or interactions_problem(
            "q_model.action_interactions", q.action_interactions, q.terms, self.states
        )
        if problem:
            raise ValueError(problem)
        if q.action_slopes == "shared" and self.evaluation.m_out_of_n:
            raise ValueError(
                "evaluation.m_out_of_n tests near-ties with the variance of separate per-action fits; it cannot be "
                "combined with q_model.action_slopes: shared"
            )
        return self

    @model_validator(mode="after")
    def _constraints_refer_to_protocol(self) -> Protocol:
        states, labels = set(self.state_names), set(self.action_labels)
        _refuse_repeats([r.name for r in self.constraints.clinical_rules], "constraints", "clinical rule name")
        for rule in self.constraints.clinical_rules:
            unknown = sorted(set(rule.forbid) - labels) or sorted({c.state for c in rule.when} - states)
            if unknown:
                raise ValueError(f"clinical rule {rule.name!r} names {unknown[0]!r}: not a declared action or state")
            for condition in rule.when:
                _condition_fits_state(rule.name, condition, self.states)
        if self.constraints.max_intensity_change is not None:
            missing = [a.label for a in self.actions if a.intensity is None]
            if missing:
                raise ValueError(f"max_intensity_change needs an intensity on every action; {missing[0]!r} has none")
        return self

    @model_validator(mode="after")
    def _comparators_fit_protocol(self) -> Protocol:
        _refuse_repeats([c.name for c in self.comparators], "comparators", "comparator name")
        for index, comparator in enumerate(self.comparators):
            problem = comparator_problem(index, comparator, self.states, self.actions, self.constraints)
            if problem:
                raise ValueError(problem)
        return self

    @model_validator(mode="after")
    def _comparison_only(self) -> Protocol:
        """With ``analysis.learn_regime: false`` nothing is learned: refuse what needs a learned regime, and settle
        the headline among the named strategies."""
        if self.analysis.learn_regime:
            if self.analysis.headline is not None:
                raise ValueError(
                    "analysis.headline names the headline of a study that learns no regime; with learn_regime: true "
                    "the headline is the learned regime or strategies.headline: remove analysis.headline"
                )
            return self
        for key, why in (
            ("strategies", "partial adoption and the other strategies are derived from the learned regime"),
            ("sweeps", "the specification sweep varies how the regime is learned"),
        ):
            if getattr(self, key) is not None:
                raise ValueError(
                    f"{key}: {why}, but analysis.learn_regime is false: remove {key} or set learn_regime: true"
                )
        if self.evaluation.bootstrap_regime == "refit":
            raise ValueError(
                "evaluation.bootstrap_regime: refit learns the regime again in each replicate, but "
                "analysis.learn_regime is false: remove bootstrap_regime"
            )
        named = self.named_strategies
        if not named:
            raise ValueError(
                "analysis.learn_regime is false and there is nothing to compare with usual care: add comparators or "
                "set evaluation.fixed_strategies: true"
            )
        if self.analysis.headline is None and len(self.comparators) != 1:
            raise ValueError(
                "analysis.headline: with learn_regime: false, name the strategy the headline reports (one of "
                f"{', '.join(named)})"
            )
        if self.analysis.headline is not None and self.analysis.headline not in named:
            raise ValueError(
                f"analysis.headline: {self.analysis.headline!r} is not a named strategy of this protocol; use one of "
                f"{', '.join(named)}"
            )
        return self

    @model_validator(mode="after")
    def _reference_is_a_regime(self) -> Protocol:
        names = ["usual_care", *(["learned"] if self.analysis.learn_regime else []), *self.named_strategies]
        if self.evaluation.reference not in names:
            raise ValueError(
                f"evaluation.reference: {self.evaluation.reference!r} is not a regime of this protocol; use one of "
                f"{', '.join(names)}"
            )
        return self

    @model_validator(mode="after")
    def _survival_needs_episodes(self) -> Protocol:
        if self.survival is not None and self.data.episodes is None:
            raise ValueError(
                "survival needs the episodes table with follow-up and event columns; set data.episodes or remove "
                "survival"
            )
        if self.survival is not None and self.data.columns.day is None:
            raise ValueError(
                "survival needs real days since the index date, but data.columns.day is null; name the day column "
                "or remove survival"
            )
        return self

    @model_validator(mode="after")
    def _selfcheck_confounder_fits(self) -> Protocol:
        if self.selfcheck is not None:
            problem = confounder_problem(self.selfcheck.confounder_gamma, self.sensitivity, self.analysis.learn_regime)
            if problem is not None:
                raise ValueError(f"selfcheck.confounder_gamma {problem}")
        return self

    @model_validator(mode="after")
    def _sweep_grid_valid(self) -> Protocol:
        if self.sweeps is not None:
            if max(self.sweeps.gammas) > self.sensitivity.gamma_max:
                raise ValueError(f"sweeps.gammas must not exceed sensitivity.gamma_max ({self.sensitivity.gamma_max})")
            sweep_specifications(self)
        return self

    @property
    def named_strategies(self) -> tuple[str, ...]:
        """The strategies the protocol names: the fixed ``always_<action>`` (with evaluation.fixed_strategies), then
        the comparators."""
        fixed = [f"always_{a}" for a in self.action_labels] if self.evaluation.fixed_strategies else []
        return (*fixed, *(c.name for c in self.comparators))

    @property
    def headline_regime(self) -> str | None:
        """With ``analysis.learn_regime: false``, the named strategy the headline reports (else None)."""
        if self.analysis.learn_regime:
            return None
        return self.analysis.headline or self.comparators[0].name

    @property
    def action_labels(self) -> tuple[str, ...]:
        return tuple(a.label for a in self.actions)

    @property
    def state_names(self) -> tuple[str, ...]:
        return tuple(s.name for s in self.states)


def _condition_fits_state(rule: str, condition, states) -> None:
    """A condition on a categorical state is ``in`` / ``not_in`` a list of its levels; on a numeric state it
    compares numbers. Raises ValueError naming the rule, the state and the fix."""
    state = next(s for s in states if s.name == condition.state)
    where = f"clinical rule {rule!r}, condition on {state.name!r}"
    if state.kind != "categorical":
        if condition.values is not None and any(isinstance(v, str) for v in condition.values):
            raise ValueError(f"{where}: {state.kind} state compares numbers, not text; write numbers in values")
        return
    if condition.comparison not in ("in", "not_in"):
        raise ValueError(
            f"{where}: {condition.comparison!r} needs an ordered number, but the state is categorical; "
            "write comparison: in (or not_in) with values: [its levels]"
        )
    unknown = [v for v in map(level_text, condition.values) if v not in state.coded_levels]
    if unknown:
        raise ValueError(f"{where}: {unknown[0]!r} is not one of its levels {list(state.coded_levels)}")


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
            raise ValueError(
                f"sweeps: combination {spec_id} ({shown}) is not a valid protocol: "
                f"{describe_validation_error(err, _with_settings(base, settings), Protocol)}; remove one of its values"
            ) from None
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
        raise ValueError(
            f"sweeps.axes.{axis}: value {value!r} is not allowed "
            f"({describe_validation_error(err, _with_settings(base, {axis: value}), Protocol)}); "
            "change or remove it"
        ) from None
    section, field = axis.split(".")
    return getattr(getattr(changed, section), field)
