"""Before the first kept draw: start() (Laplace fit, tuning, chain starts, evidence) and
refine() (the warm-up).
"""
