"""Running chains: proposal, the compiled engines, the walker, warm-up, sampling, checkpoints."""
