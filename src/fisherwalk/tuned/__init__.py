"""A family made ready for one model: its Tuning (metric and the family's own parameter) and
the Walker that start() returns.
"""
