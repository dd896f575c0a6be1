"""Running chains: walkers, the compiled loops, warm-up, sampling and checkpoints."""
