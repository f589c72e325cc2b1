"""The usual-care model's design matrix: scaled states, optional natural cubic splines, the protocol's extra terms,
the decision index and missing indicators, fitted once on the records and applied to any table of states.
"""

from __future__ import annotations

from dataclasses import dataclass

from regimewise.core.features import StateScaler, stack_by_blocks
from regimewise.core.terms import TermColumns, spline_design, spline_values, uncentred


@dataclass(frozen=True)
class BehaviourDesign:
    """Covariates of the usual-care model: scaled states, natural-spline bases, extra terms and the decision index.

    States named in ``spline_states`` enter through a natural cubic regression spline basis with ``spline_df``
    columns (patsy ``cr``, centred so the model's own intercept stays identifiable; Hastie & Tibshirani 1990,
    *Generalized Additive Models*; Wood 2017, *Generalized Additive Models*, 2nd ed., section 5.3.1). Knots sit
    at quantiles of the training values; beyond the outer knots the basis continues linearly. The other states
    enter linearly, scaled as in :class:`regimewise.core.features.StateScaler`, followed by its missing-indicator
    columns (0/1, for states with ``data.missing: indicator``; left out when constant in the training data), then
    the columns of ``behaviour_model.terms`` (:class:`regimewise.core.terms.TermColumns`: powers, interactions, and
    splines that replace their state's linear column like ``spline_states``).
    """

    scaler: StateScaler
    splines: tuple[tuple[str, object], ...]
    horizon: int
    include_step: bool
    terms: TermColumns | None = None

    @classmethod
    def fit(cls, frame, protocol):
        spec = protocol.behaviour_model
        scaler = StateScaler.fit(frame, protocol)
        use_splines = spec.kind == "multinomial_logit"
        fix = "lower behaviour_model.spline_df or remove the state from behaviour_model.spline_states"
        splines = tuple(
            (name, spline_design(frame[name].to_numpy(dtype=float), spec.spline_df, name, fix))
            for name in (spec.spline_states if use_splines else [])
        )
        terms = TermColumns.fit(spec.terms, frame, scaler, spec.spline_df) if spec.terms else None
        return cls(scaler, splines, protocol.horizon, spec.include_step, terms)

    def _replaced(self):
        """States whose linear column a spline replaces."""
        return {name for name, _ in self.splines} | set(self.terms.spline_states if self.terms else ())

    def transform(self, frame):
        """Design matrix (n, len(names)): the scaled states a block of rows at a time, the other columns on the whole
        table (:func:`regimewise.core.features.stack_by_blocks`)."""
        replaced = self._replaced()
        linear = [j for j, name in enumerate(self.scaler.names) if name not in replaced]
        whole = []
        for name, info in self.splines:
            whole.append(spline_values(info, frame[name].to_numpy(dtype=float)))
        if self.terms is not None:
            whole.append(self.terms.transform(frame, uncentred(self.scaler, frame)))
        if self.include_step:
            whole.append((frame["step"].to_numpy(dtype=float) / max(self.horizon - 1, 1))[:, None])
        return stack_by_blocks(frame, self.scaler, lambda scaled: [scaled[:, linear]], whole)

    @property
    def names(self):
        replaced = self._replaced()
        names = [name for name in self.scaler.names if name not in replaced]
        for name, info in self.splines:
            names += [f"ns({name})[{k}]" for k in range(len(info.column_names))]
        names += list(self.terms.names) if self.terms is not None else []
        return names + (["step_fraction"] if self.include_step else [])
