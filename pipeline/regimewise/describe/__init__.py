"""The cohort: baseline table with small-cell suppression, and balance of the states between actions at every
decision point, before and after weighting.
"""
