"""The research protocol: one YAML file, validated by a pydantic model with unknown keys forbidden.

:mod:`.sections` holds the field types and the sections, :mod:`.model` the whole :class:`Protocol` and its
specification sweeps, :mod:`.loading` the YAML reader and the schema export. The names below are the ones the
rest of the package uses.
"""

from regimewise.protocol.loading import (
    ProtocolFile,
    export_schema,
    load_protocol,
    protocol_schema,
)
from regimewise.protocol.model import Protocol, Specification, sweep_specifications
from regimewise.protocol.sections import (
    Action,
    BehaviourModelSpec,
    ClinicalRule,
    Constraints,
    EvaluationSpec,
    QModelSpec,
    SelfCheckSpec,
    SensitivitySpec,
    StateCondition,
    StateVariable,
    SurvivalSpec,
    SweepSpec,
    confounder_problem,
)

__all__ = [
    "Action",
    "BehaviourModelSpec",
    "ClinicalRule",
    "Constraints",
    "EvaluationSpec",
    "Protocol",
    "ProtocolFile",
    "QModelSpec",
    "SelfCheckSpec",
    "SensitivitySpec",
    "Specification",
    "StateCondition",
    "StateVariable",
    "SurvivalSpec",
    "SweepSpec",
    "confounder_problem",
    "export_schema",
    "load_protocol",
    "protocol_schema",
    "sweep_specifications",
]
