"""The invented Harbourline demo scenario: a simulator with known truths (values of any regime by Monte Carlo with
common random numbers). Invented data for the demo and the tests only.
"""
