"""Running chains: proposal, the compiled engine, the walker, warm-up, sampling, checkpoints."""
