"""Shared building blocks: array checks, state features, patient folds, seed streams, the bootstrap quantile rule,
and inverse-probability weights. Imports nothing above it.
"""
