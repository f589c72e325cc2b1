"""Design columns of the protocol's extra model terms (:mod:`regimewise.protocol.terms`), and how the linear
Q-model's coefficients vary with the action (:class:`ActionSlopes`).

A power or an interaction is computed from the states divided by their training standard deviation
(:class:`regimewise.core.features.StateScaler`) but not centred, a categorical state as its treatment-coded dummies;
a spline from the state's recorded values. Dividing by a constant changes no least-squares fit, so a term means
exactly what the same term of a regression formula means, also when only some terms get action-specific slopes
(centring would not be harmless there: (x − m)·z·1[a] = x·z·1[a] − m·z·1[a] brings in a term the model may not have).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from regimewise.core.arrays import exact_power, has_distinct
from regimewise.errors import UserInputError


@dataclass(frozen=True)
class ActionSlopes:
    """How the linear Q-model's coefficients vary with the action.

    ``shared=False`` (the default): each action has its own intercept and slopes (one least-squares fit per
    decision point and action). ``shared=True``: one fit per decision point of
    Q(s, a) = β₀ + γ_a + Σ_{j ∉ J} θ_j x_j + Σ_{j ∈ J} θ_{a,j} x_j: an intercept shift γ_a per action (γ = 0 for the
    first action present at that point), slopes θ_j common to every action, and each action's own slopes on the
    design columns ``interactions`` (J; indices into the design [1, X], so 1 is X's first column). With a ridge
    penalty, neither the intercept nor the shifts are penalised and every action's own slopes are penalised alike,
    so the fit does not depend on the order of the actions.
    """

    shared: bool = False
    interactions: tuple[int, ...] = ()


SEPARATE = ActionSlopes()


@dataclass(frozen=True)
class TermColumns:
    """The columns of a model's extra terms, fitted on training decisions and applied to any table of states.

    ``names`` lists the columns: ``age^2``, ``sbp:potassium``, ``education[college]:sbp`` (one per dummy of a
    categorical), ``ns(age)[0]``… (``df`` columns of a spline); ``groups`` gives, per term, the names of its
    columns (empty when a categorical's dummies were all left out of this fit).
    """

    terms: tuple
    parts: tuple  # per term: ("power", column, power) | ("interaction", columns_a, columns_b) | ("spline", state, info)
    names: tuple[str, ...]
    groups: tuple[tuple[str, ...], ...]

    @classmethod
    def fit(cls, terms, frame: pd.DataFrame, scaler, default_df: int = 4) -> TermColumns:
        parts, names, groups = [], [], []
        for term in terms:
            if term.interaction is not None:
                left, right = (state_columns(scaler, name) for name in term.interaction)
                columns = [(a, b) for a in left for b in right]
                parts.append(("interaction", tuple(columns)))
                group = tuple(f"{scaler.names[a]}:{scaler.names[b]}" for a, b in columns)
            elif term.spline is not None:
                df = term.df or default_df
                info = spline_design(frame[term.spline].to_numpy(dtype=float), df, term.spline)
                parts.append(("spline", term.spline, info))
                group = tuple(f"ns({term.spline})[{k}]" for k in range(len(info.column_names)))
            else:
                parts.append(("power", state_columns(scaler, term.state)[0], term.power))
                group = (term.label,)
            names += group
            groups.append(group)
        return cls(tuple(terms), tuple(parts), tuple(names), tuple(groups))

    def transform(self, frame: pd.DataFrame, scaled: np.ndarray) -> np.ndarray:
        """The term columns (n, len(names)); ``scaled`` holds the scaler's columns of ``frame`` divided by their
        scale, not centred (:func:`uncentred`)."""
        blocks = []
        for part in self.parts:
            if part[0] == "interaction":
                blocks += [scaled[:, a] * scaled[:, b] for a, b in part[1]]
            elif part[0] == "spline":
                blocks += list(spline_values(part[2], frame[part[1]].to_numpy(dtype=float)).T)
            else:
                blocks.append(exact_power(scaled[:, part[1]], part[2]))
        return np.column_stack(blocks) if blocks else np.zeros((len(frame), 0))

    @property
    def spline_states(self) -> tuple[str, ...]:
        return tuple(part[1] for part in self.parts if part[0] == "spline")

    def columns_of(self, term) -> tuple[str, ...]:
        """Names of the columns of ``term`` (matched by its identity, so a spline's df need not be repeated)."""
        for own, group in zip(self.terms, self.groups):
            if own.key == term.key:
                return group
        return ()


def uncentred(scaler, frame: pd.DataFrame) -> np.ndarray:
    """The scaler's columns of ``frame`` divided by their scale, not centred (dummies and indicators as 0/1)."""
    return scaler.unscaled(frame) / np.asarray(scaler.scales)


def state_columns(scaler, state: str) -> list[int]:
    """Indices in the scaler's columns of a state: its own column, or its dummies in use if categorical."""
    dummies = [scaler.names.index(column) for column, owner, _ in scaler.dummies if owner == state]
    if dummies or state not in scaler.names:
        return dummies
    return [scaler.names.index(state)]


SPLINE_FIX = "lower the spline's df or enter the state without one"


def spline_basis(values: np.ndarray, df: int, name: str, fix: str = SPLINE_FIX):
    """patsy's centred natural cubic regression spline basis of ``values`` (Wood 2017, *Generalized Additive
    Models*, 2nd ed., section 5.3.1), a design matrix whose ``design_info`` (:func:`spline_design`) builds the
    basis at other values; :class:`UserInputError` when the values are too few for ``df``."""
    import patsy  # here, not at the top: a job without spline terms starts without it

    return patsy.build_design_matrices([spline_design(values, df, name, fix)], {"x": values})[0]


# Rows of a spline basis computed at a time (:func:`spline_values`): a few MB of temporaries instead of eight
# arrays of the whole table's size.
SPLINE_BLOCK_ROWS = 16_384


def spline_values(info, values: np.ndarray) -> np.ndarray:
    """``numpy.asarray(patsy.build_design_matrices([info], {"x": values})[0])`` for a design info of
    :func:`spline_design`, the same bits in the same memory layout, with the spline's unconstrained basis computed
    :data:`SPLINE_BLOCK_ROWS` rows at a time.

    patsy evaluates the basis with whole-table temporaries (eight arrays of rows x knots at 12M rows); here its own
    function for the unconstrained basis (``_get_free_crs_dmatrix``) runs on one block of rows after another, into a
    matrix of the layout its whole-table result has, and the centring constraint is absorbed by the one matrix
    product patsy makes on the whole matrix (a product is left as it was: another shape may round differently).
    Each entry of the basis depends on its own value only, so the blocks change no bit (a test compares with
    patsy). Values with a missing or infinite entry, and design infos of another kind, go through patsy itself.
    """
    import patsy  # here, not at the top: a job without spline terms starts without it

    values = np.asarray(values)
    transform = _cr_transform(info)
    if transform is None or values.ndim != 1 or values.dtype != np.float64 or not np.isfinite(values).all():
        return np.asarray(patsy.build_design_matrices([info], {"x": values})[0])
    from patsy.mgcv_cubic_splines import _get_free_crs_dmatrix
    from scipy import linalg

    knots, constraints = transform._all_knots, transform._constraints
    free = np.empty((values.size, knots.size), order="F")  # the layout of patsy's (knots x rows).T
    for start in range(0, values.size, SPLINE_BLOCK_ROWS):
        rows = slice(start, start + SPLINE_BLOCK_ROWS)
        free[rows] = _get_free_crs_dmatrix(values[rows], knots)
    if constraints is not None:  # patsy's _absorb_constraints
        q, _ = linalg.qr(np.transpose(constraints))
        free = np.dot(free, q[:, constraints.shape[0] :])
    out = np.empty(free.shape)  # patsy's design matrix: C order, each column 1 times the factor's column
    out[...] = 1
    out *= free
    return out


def _cr_transform(info):
    """The fitted ``cr`` transform of a design info of :func:`spline_design` (one term of one natural, not cyclic,
    cubic regression spline of ``x``), or None for any other design info."""
    try:
        from patsy.mgcv_cubic_splines import CR
    except ImportError:  # another patsy: its own path serves
        return None
    factors = list(info.factor_infos.values())
    if len(factors) != 1 or len(info.term_codings) != 1 or factors[0].type != "numerical":
        return None
    transforms = list(factors[0].state.get("transforms", {}).values())
    if len(transforms) != 1 or not isinstance(transforms[0], CR) or transforms[0]._cyclic:
        return None
    cr = transforms[0]
    (subterms,) = info.term_codings.values()
    columns = cr._all_knots.size - (0 if cr._constraints is None else len(cr._constraints))
    if len(subterms) != 1 or subterms[0].num_columns != columns or factors[0].num_columns != columns:
        return None
    return cr


# Values the type check of a spline's factor sees: its column count is the basis's df whatever the values.
TYPE_CHECK_ROWS = 8


def spline_design(values: np.ndarray, df: int, name: str, fix: str = SPLINE_FIX):
    """The design info of :func:`spline_basis` (``patsy.dmatrix(...).design_info``, the same knots and centring):
    ``patsy.build_design_matrices([info], {"x": x})`` gives the basis at any values ``x``.

    The fits build the basis from the info, so the matrix ``dmatrix`` evaluates along with the info would be
    thrown away; and patsy checks the factor's type by evaluating the basis on the data of one more pass, after
    the knots are placed, which here holds a few values only. The knots and the centring constraint come from
    the one pass over all values that ``cr`` asks for."""
    if not has_distinct(values, df + 1):
        raise UserInputError(
            f"state {name!r}: a spline with {df} degrees of freedom needs more than {df} distinct values, the "
            f"records have {np.unique(values).size}; {fix}"
        )
    import patsy  # here, not at the top: a job without spline terms starts without it

    passes = []

    def data():  # patsy asks for the data once per pass of cr's memorizing (one), then once for the type check
        passes.append(None)
        return iter([{"x": values if len(passes) == 1 else values[:TYPE_CHECK_ROWS]}])

    rhs = patsy.ModelDesc.from_formula(f"cr(x, df={df}, constraints='center') - 1").rhs_termlist
    return patsy.design_matrix_builders([rhs], data, eval_env=0)[0]
