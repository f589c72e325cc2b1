"""Usual care in the invented scenario: the true probability of each action given the state and the hidden frailty."""

from __future__ import annotations

import numpy as np

from regimewise.demo.scenario import (
    ACTIONS,
    ADD_AGENT,
    STEP_DOWN,
    STEP_UP,
    ScenarioParams,
)


def usual_care_probabilities(states, frailty, confounding_strength=1.0, params=None):
    """True usual-care probability of each action given the state and the hidden frailty.

    Multinomial logit with hold as reference (linear predictors ``eta``; see :class:`ScenarioParams` for
    the coefficients), then mixed with a floor: ``p = (1 - k f) softmax(eta) + f`` over the ``k`` permitted
    actions, so every permitted action has probability at least ``f = proba_floor``. step_down is not
    permitted at therapy level 0 (probability exactly 0). Clinical inertia: the intercepts make hold the
    most likely action even well above target pressure.

    Parameters
    ----------
    states : mapping or DataFrame with the :data:`STATES` columns (arrays of equal length).
    frailty : array of the hidden frailty, one per row.
    confounding_strength : float, multiplies the frailty coefficients (0 removes them).
    params : ScenarioParams or None for the defaults.

    Returns
    -------
    ndarray (n, 4), rows summing to 1, columns ordered as :data:`ACTIONS`.

    Examples
    --------
    >>> import numpy as np
    >>> s = {"sbp": np.array([165.0]), "egfr": np.array([70.0]), "potassium": np.array([4.2]),
    ...      "age": np.array([60]), "diabetes": np.array([0]), "adherence": np.array([0.8]),
    ...      "therapy_level": np.array([0])}
    >>> float(usual_care_probabilities(s, np.zeros(1))[0, 1])  # step_down at therapy level 0
    0.0
    """
    p = params or ScenarioParams()
    su = confounding_strength * np.asarray(frailty, dtype=float)
    sbp, k, level = (np.asarray(states[c], dtype=float) for c in ("sbp", "potassium", "therapy_level"))
    eta = np.zeros((sbp.size, len(ACTIONS)))
    eta[:, STEP_DOWN] = (
        p.down_intercept
        + p.down_sbp * (120.0 - sbp) / 10.0
        + p.down_potassium * np.maximum(0.0, k - 5.0)
        + p.down_age * (np.asarray(states["age"]) - 65.0) / 10.0
        + p.down_frailty * su
    )
    eta[:, STEP_UP] = (
        p.up_intercept
        + p.up_sbp * (sbp - 140.0) / 10.0
        + p.up_adherence * (np.asarray(states["adherence"]) - 0.7)
        - p.up_potassium * np.maximum(0.0, k - 4.8)
        - p.up_level * level
        - p.up_frailty * su
    )
    eta[:, ADD_AGENT] = (
        p.add_intercept
        + p.add_sbp * (sbp - 150.0) / 10.0
        + p.add_egfr * (np.asarray(states["egfr"]) - 60.0) / 10.0
        - p.add_potassium * np.maximum(0.0, k - 4.5)
        + p.add_diabetes * np.asarray(states["diabetes"])
        - p.add_frailty * su
    )
    permitted = np.ones_like(eta, dtype=bool)
    permitted[:, STEP_DOWN] = level > 0
    weight = np.where(permitted, np.exp(eta - eta.max(axis=1, keepdims=True)), 0.0)
    softmax = weight / weight.sum(axis=1, keepdims=True)
    k_permitted = permitted.sum(axis=1, keepdims=True)
    return np.where(permitted, (1.0 - k_permitted * p.proba_floor) * softmax + p.proba_floor, 0.0)
