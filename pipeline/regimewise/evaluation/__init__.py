"""Off-policy evaluation: the importance-sampling and doubly robust estimators, fitted-Q evaluation, and the
values and contrasts of every compared regime.
"""
