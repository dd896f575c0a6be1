"""Models as practitioners write them: a NumPyro model, or a hand-written log density with
declared constraints, turned into a log density on the unconstrained space and the map
back to the model's own space (:mod:`.space`, :mod:`.numpyro_model`, :mod:`.declared`)."""
