"""The compiled loops: the one chain state, the random walk's and the gradient families' chunk
loops, metric, step-size adaptation, memory, progress.
"""
