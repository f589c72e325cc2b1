"""The usual-care model's design matrix: scaled states, optional natural cubic splines, the decision index and
missing indicators, fitted once on the records and applied to any table of states.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import patsy

from regimewise.core.features import StateScaler
from regimewise.errors import UserInputError


@dataclass(frozen=True)
class BehaviourDesign:
    """Covariates of the usual-care model: scaled states, natural-spline bases, and the decision index.

    States named in ``spline_states`` enter through a natural cubic regression spline basis with ``spline_df``
    columns (patsy ``cr``, centred so the model's own intercept stays identifiable; Hastie & Tibshirani 1990,
    *Generalized Additive Models*; Wood 2017, *Generalized Additive Models*, 2nd ed., section 5.3.1). Knots sit
    at quantiles of the training values; beyond the outer knots the basis continues linearly. The other states
    enter linearly, scaled as in :class:`regimewise.core.features.StateScaler`, followed by its missing-indicator
    columns (0/1, for states with ``data.missing: indicator``; left out when constant in the training data).
    """

    scaler: StateScaler
    splines: tuple[tuple[str, object], ...]
    horizon: int
    include_step: bool

    @classmethod
    def fit(cls, frame, protocol):
        spec = protocol.behaviour_model
        scaler = StateScaler.fit(frame, protocol)
        use_splines = spec.kind == "multinomial_logit"
        splines = tuple(
            (name, _spline_basis(frame[name].to_numpy(dtype=float), spec.spline_df, name).design_info)
            for name in (spec.spline_states if use_splines else [])
        )
        return cls(scaler, splines, protocol.horizon, spec.include_step)

    def transform(self, frame):
        """Design matrix (n, len(names))."""
        spline_names = {name for name, _ in self.splines}
        linear = [j for j, name in enumerate(self.scaler.names) if name not in spline_names]
        blocks = [self.scaler.transform(frame)[:, linear]]
        for name, info in self.splines:
            blocks.append(np.asarray(patsy.build_design_matrices([info], {"x": frame[name].to_numpy(dtype=float)})[0]))
        if self.include_step:
            blocks.append((frame["step"].to_numpy(dtype=float) / max(self.horizon - 1, 1))[:, None])
        return np.column_stack(blocks)

    @property
    def names(self):
        spline_names = {name for name, _ in self.splines}
        names = [name for name in self.scaler.names if name not in spline_names]
        for name, info in self.splines:
            names += [f"ns({name})[{k}]" for k in range(len(info.column_names))]
        return names + (["step_fraction"] if self.include_step else [])


def _spline_basis(values, df, name):
    if np.unique(values).size <= df:
        raise UserInputError(
            f"state {name!r}: a spline with {df} degrees of freedom needs more than {df} distinct values, the "
            f"records have {np.unique(values).size}; "
            "lower behaviour_model.spline_df or remove the state from behaviour_model.spline_states"
        )
    return patsy.dmatrix(f"cr(x, df={df}, constraints='center') - 1", {"x": values})
