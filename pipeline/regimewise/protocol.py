"""The research protocol: one YAML file, validated by a pydantic model with unknown keys forbidden.

Every setting a stage reads lives here, with its constraint in its type. Paths inside the protocol resolve
relative to the protocol file. ``config/protocol.schema.json`` is exported from :class:`Protocol` by
:func:`export_schema` and never edited by hand.

Clinical rules and reward definitions are structured data, never expression strings: nothing in a protocol is
ever evaluated as code.
"""

from __future__ import annotations

import hashlib
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


class DataSpec(_Strict):
    """Where the records are and how their columns are named."""

    decisions: ColumnName = Field(description="decisions table (CSV or Parquet), relative to the protocol file")
    episodes: ColumnName | None = Field(None, description="optional episodes table, relative to the protocol file")
    columns: ColumnMap = ColumnMap()


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


class RewardSpec(_Strict):
    """The reward is the decisions file's reward column, observed after the action; larger is better."""

    description: LongText


class BehaviourModelSpec(_Strict):
    """Model of usual care: the probability of each action given the state."""

    kind: Literal["multinomial_logit"] = "multinomial_logit"
    include_step: bool = Field(True, description="add the decision index as a covariate")
    max_iterations: Annotated[int, Field(ge=10, le=1000)] = 100


class QModelSpec(_Strict):
    """Model of the action-value function at each decision point."""

    kind: Literal["linear"] = Field("linear", description="least squares with action-by-state interactions")
    basis: Literal["linear", "quadratic"] = Field(
        "linear", description="quadratic adds the square of every non-binary state to the covariates"
    )
    ridge_alpha: Annotated[float, Field(ge=0.0, le=1e6)] = 0.0


class Constraints(_Strict):
    """Safeguards on the learned regime."""

    support_threshold: Probability = Field(
        0.05, description="an action may be recommended only if usual care's estimated probability is at least this"
    )


class EvaluationSpec(_Strict):
    """Off-policy evaluation settings."""

    estimators: Annotated[list[Literal["pdwis", "wdr", "fqe"]], Field(min_length=1)] = ["pdwis", "wdr", "fqe"]
    fixed_strategies: bool = Field(True, description="also evaluate 'always <action>' for every action")

    @model_validator(mode="after")
    def _unique(self) -> EvaluationSpec:
        if len(set(self.estimators)) != len(self.estimators):
            raise ValueError("evaluation.estimators lists an estimator twice")
        return self


class ReportSpec(_Strict):
    """Report settings."""

    min_cell_count: Annotated[int, Field(ge=1, le=1000)] = Field(
        11, description="counts from 1 to min_cell_count - 1 are shown as '<min_cell_count'"
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
    seed: Seed
    report: ReportSpec = ReportSpec()

    @model_validator(mode="after")
    def _names_unique(self) -> Protocol:
        _refuse_repeats([s.name for s in self.states], "states", "state name")
        _refuse_repeats([s.source_column for s in self.states], "states", "state column")
        _refuse_repeats([a.label for a in self.actions], "actions", "action label")
        contract = {c for c in self.data.columns.model_dump().values() if c is not None}
        clash = sorted(contract & {s.source_column for s in self.states})
        if clash:
            raise ValueError(f"state column {clash[0]!r} is also a data-contract column in data.columns")
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
    return ProtocolFile(protocol=protocol, path=path, sha256=hashlib.sha256(raw).hexdigest())


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
