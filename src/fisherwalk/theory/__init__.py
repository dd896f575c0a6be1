"""Step size and target acceptance from the Gaussian limit: random walk and gradient samplers."""
