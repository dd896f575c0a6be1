"""Large-sample theory of the samplers: optimal scale, step and target acceptance by dimension."""
