"""What the regime stage reports besides the recommendations: the constraints in force, what each safeguard
changed (side-by-side regimes), clinical-rule counts, and recommended versus taken actions by step.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from regimewise.cautions import RECOMMENDATION_CAUTION
from regimewise.core.features import action_codes
from regimewise.protocol.model import Protocol
from regimewise.regime.clinical_rules import ClinicalRuleSet

SAFEGUARD_LABELS = {
    "unconstrained": "Unconstrained",
    "support": "Support-constrained",
    "rules": "Rule- and support-constrained",
    "pessimistic": "Pessimistic (rules, support, Q minus k bootstrap standard deviations)",
}


def safeguard_summary(
    protocol: Protocol,
    decisions: pd.DataFrame,
    variants: dict,
    chosen: dict,
    behaviour_proba: np.ndarray,
    rules: ClinicalRuleSet,
) -> dict:
    """How often each side-by-side regime differs from usual care and how many decisions each safeguard changed.

    ``chosen`` maps each variant name (in :data:`SAFEGUARDS` order) to its recommended action codes at the
    decisions; a safeguard's count is the decisions where its regime differs from the previous one.
    """
    taken = action_codes(decisions, protocol.action_labels)
    most_likely = behaviour_proba.argmax(axis=1)
    violations = {name: rules.violations(decisions, codes) for name, codes in chosen.items()}
    rows, previous = [], None
    for name, codes in chosen.items():
        rows.append(
            {
                "name": name,
                "label": SAFEGUARD_LABELS[name],
                "share_differs_from_taken": float(np.mean(codes != taken)),
                "share_differs_from_usual_most_likely": float(np.mean(codes != most_likely)),
                "decisions_changed_by_this_safeguard": None if previous is None else int(np.sum(codes != previous)),
                "rule_violations": int(violations[name].sum()),
                "decisions_without_permitted_action": int(variants[name].n_without_permitted_action_),
            }
        )
        previous = codes
    return {"side_by_side": rows, "clinical_rules": {**rules.to_dict(), **rules.counts(decisions)}}


def regime_summary(p, frame, fqi, features, recommended, probabilities) -> dict:
    """The constraints in force, what they changed, and recommended versus taken actions by step."""
    taken = action_codes(frame, p.action_labels)
    labels = p.action_labels
    by_step = {}
    for step, rows in frame.groupby("step").indices.items():
        by_step[str(step)] = {
            "decisions": int(len(rows)),
            "recommended": {a: int(np.sum(recommended[rows] == k)) for k, a in enumerate(labels)},
            "taken": {a: int(np.sum(taken[rows] == k)) for k, a in enumerate(labels)},
        }
    q = p.q_model
    return {
        "caution": RECOMMENDATION_CAUTION,
        "method": "fitted-Q iteration ("
        + ("one Q-model per decision point, fitted backward" if q.learning_mode == "backward" else "one pooled Q-model")
        + f"), {q.kind.replace('_', ' ')} Q-model, "
        "clinical rules and support constraint" + (", pessimistic" if p.constraints.pessimism > 0 else ""),
        "constraints": {
            "support_threshold": p.constraints.support_threshold,
            "max_intensity_change": p.constraints.max_intensity_change,
            "pessimism": p.constraints.pessimism,
            "ensemble_size": p.constraints.ensemble_size if p.constraints.pessimism > 0 else None,
        },
        "decisions": int(len(frame)),
        "decisions_changed_by_support": int(fqi.n_changed_by_support_),
        "decisions_without_permitted_action": int(fqi.n_without_permitted_action_),
        "share_differs_from_taken": float(np.mean(recommended != taken)),
        "by_step": by_step,
        "q_model": {
            "kind": q.kind,
            "learning_mode": q.learning_mode,
            "basis": q.basis,
            "terms": q.term_labels,
            "action_slopes": q.action_slopes,
            "action_interactions": q.interaction_labels,
            "ridge_alpha": q.ridge_alpha,
            "ridge_alpha_used": list(fqi.alpha_),
            "iterations": int(fqi.n_iterations_),
            "converged": bool(fqi.converged_),
            "out_of_fold_mse_by_step": {str(t): v for t, v in (fqi.oof_mse_ or {}).items()},
            "covariates": ["intercept", *features.names],
            "coefficients": np.asarray(fqi.coef_).tolist() if hasattr(fqi, "coef_") else None,
            "scaler": features.scaler.to_dict(),
        },
    }
