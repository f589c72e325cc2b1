"""Sensitivity to unmeasured confounding: marginal-sensitivity bounds over a Γ grid, the tipping point and
E-values.
"""
