"""Learning the regime: Q-models, fitted-Q iteration, the permitted-action rule (clinical rules ∩ support),
pessimism, cross-fitting, the readable tree and the regime stage's summaries. Research use only.
"""
