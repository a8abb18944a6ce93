"""The sampler and replica exchange (move schedulers), the run store, run and resume."""
