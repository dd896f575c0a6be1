"""Sampler families: one module per family (randomwalk, mala, hmc, nuts) and the registry.

A family is data (:class:`fisherwalk.samplers.family.Family`, a NamedTuple of pure
functions and values, after BlackJAX's ``SamplingAlgorithm`` and optax's
``GradientTransformation``); :mod:`fisherwalk.samplers.registry` lists them.
"""
