"""Sampling engines: the sampler protocol, the emcee ensemble driver and the run loop."""

from chainyard.engine.ensemble import EnsembleDriver
from chainyard.engine.protocol import SamplerDriver, StepRows
from chainyard.engine.run import Interrupted, sample

__all__ = ["EnsembleDriver", "Interrupted", "SamplerDriver", "StepRows", "sample"]
