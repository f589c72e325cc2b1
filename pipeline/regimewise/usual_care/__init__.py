"""The usual-care (behaviour) model: multinomial logit or gradient boosting, cross-fitting by patient, the
probability floor, and its diagnostics (calibration, discrimination, overlap, weights).
"""
