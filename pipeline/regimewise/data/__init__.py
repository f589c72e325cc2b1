"""Reading and validating the records: the de-identification guard, the missing-data policies, field rules and
row-spanning checks, and the clean tables every later stage reads.
"""
