"""Extra terms of the models' designs, written as structured lists (never formula strings evaluated as code).

Every model enters each declared state as a main effect (a categorical one as its treatment-coded dummies). A
``terms`` list adds, per model:

* ``{state: age, power: 2}`` (or 3): the power of a continuous or integer state;
* ``{spline: age, df: 4}``: a natural cubic regression spline of a continuous or integer state in place of its
  main effect (patsy ``cr``, centred; knots at quantiles of the training values);
* ``{interaction: [sbp, potassium]}``: the product of two states (of each dummy with the other state when one is
  categorical, of each pair of dummies when both are).

The Q-model also takes ``action_slopes: shared`` (one regression per decision point with an intercept per action
and slopes common to every action, as in a standard outcome regression for standardization) with
``action_interactions``: the states or terms whose slopes differ by action. The default ``separate`` fits each
action its own coefficients on every term (full action-by-covariate interaction).

:func:`terms_problem` checks a model's terms against the protocol when it is read: each names declared states of
the right kind, none is written twice or duplicates a column the model already has.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field, model_validator

from regimewise.protocol.types import Identifier, Strict, WholeNumber


class ModelTerm(Strict):
    """One extra term: exactly one of ``state`` with ``power``, ``spline`` (with optional ``df``), ``interaction``."""

    state: Identifier | None = Field(None, description="the state raised to `power`")
    power: Literal[2, 3] | None = Field(None, description="2 (square) or 3 (cube), with `state`")
    spline: Identifier | None = Field(None, description="a state entered as a natural cubic spline")
    df: Annotated[WholeNumber, Field(ge=3, le=10)] | None = Field(
        None, description="degrees of freedom of the spline (default: the model's spline_df, or 4)"
    )
    interaction: tuple[Identifier, Identifier] | None = Field(None, description="two states whose product enters")

    @model_validator(mode="after")
    def _one_form(self) -> ModelTerm:
        forms = [self.state is not None, self.spline is not None, self.interaction is not None]
        if sum(forms) != 1:
            raise ValueError(
                "a term is one of {state: NAME, power: 2}, {spline: NAME, df: 4} or {interaction: [NAME, NAME]}"
            )
        if self.state is not None and self.power is None:
            raise ValueError(
                f"term {{state: {self.state}}}: every state already enters as a main effect; write power: 2 or 3 "
                "for its square or cube"
            )
        if self.power is not None and self.state is None:
            raise ValueError("power needs the state it applies to: {state: NAME, power: 2}")
        if self.df is not None and self.spline is None:
            raise ValueError("df applies to a spline term: {spline: NAME, df: 4}")
        if self.interaction is not None and self.interaction[0] == self.interaction[1]:
            raise ValueError(
                f"interaction of {self.interaction[0]!r} with itself: write {{state: {self.interaction[0]}, power: 2}}"
            )
        return self

    @property
    def states(self) -> tuple[str, ...]:
        if self.interaction is not None:
            return self.interaction
        return (self.state if self.state is not None else self.spline,)

    @property
    def key(self) -> tuple:
        """Identity of the term (an interaction's two states in either order are the same term)."""
        if self.interaction is not None:
            return ("interaction", *sorted(self.interaction))
        if self.spline is not None:
            return ("spline", self.spline)
        return ("power", self.state, self.power)

    @property
    def label(self) -> str:
        """How the term is named in the models' summaries: ``age^2``, ``ns(age)``, ``sbp:potassium``."""
        if self.interaction is not None:
            return ":".join(self.interaction)
        if self.spline is not None:
            return f"ns({self.spline})"
        return f"{self.state}^{self.power}"


def term_text(term) -> str:
    """A term or state name as the protocol writes it, for messages."""
    return term if isinstance(term, str) else term.label


def terms_problem(where: str, terms, states, *, basis_degree: int = 1, splines=()) -> str | None:
    """The first problem of a model's ``terms`` as one line naming ``where`` (e.g. ``q_model.terms[1]``), or None.

    ``states`` are the protocol's state variables; ``basis_degree`` the highest power the Q-model's ``basis``
    already adds to every continuous and integer state; ``splines`` the states the model already enters as splines
    (``behaviour_model.spline_states``).
    """
    kinds = {s.name: s.kind for s in states}
    seen = {}
    for index, term in enumerate(terms):
        at = f"{where}[{index}]"
        unknown = [name for name in term.states if name not in kinds]
        if unknown:
            return f"{at}: {unknown[0]!r} is not a declared state"
        if term.key in seen:
            return f"{at}: {term.label} is already term {seen[term.key]}; write each term once"
        seen[term.key] = index
        if term.interaction is not None:
            continue
        name = term.states[0]
        if kinds[name] not in ("continuous", "integer"):
            what = "power" if term.power else "spline"
            return f"{at}: a {what} of {kinds[name]} state {name!r} adds nothing; use a continuous or integer state"
        if term.power is not None and term.power <= basis_degree:
            return f"{at}: {term.label} is already in the model (q_model.basis adds it); remove the term"
        if term.spline is not None and name in splines:
            return f"{at}: {name!r} is already in behaviour_model.spline_states; list it once"
    splined = {t.spline for t in terms if t.spline is not None} | set(splines)
    for index, term in enumerate(terms):
        if term.power is not None and term.state in splined:
            return (
                f"{where}[{index}]: {term.label} with a spline of {term.state!r}: the spline already bends; "
                "keep one of them"
            )
    return None


def interactions_problem(where: str, interactions, terms, states) -> str | None:
    """The first problem of ``q_model.action_interactions`` (each a state's main effect, named by the state, or
    a term of ``q_model.terms``), or None. The powers ``q_model.basis`` adds are of the centred state and cannot
    take action-specific slopes on their own: list them as terms, with ``basis: linear``."""
    names = {s.name for s in states}
    keys = {t.key for t in terms}
    splined = {t.spline for t in terms if t.spline is not None}
    seen = set()
    for index, entry in enumerate(interactions):
        at = f"{where}[{index}]"
        if isinstance(entry, str):
            if entry not in names:
                return f"{at}: {entry!r} is not a declared state"
            if entry in splined:
                return f"{at}: {entry!r} enters as a spline; write {{spline: {entry}}} for the spline's own slopes"
            key = ("main", entry)
        else:
            key = entry.key
            if key not in keys:
                return (
                    f"{at}: {entry.label} is not a term of the Q-model; add it to q_model.terms first (a power there "
                    "needs basis: linear)"
                )
        if key in seen:
            return f"{at}: {term_text(entry)} is listed twice"
        seen.add(key)
    return None
