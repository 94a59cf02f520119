"""Markov chain Monte Carlo stage (emcee over hyperparameters, blocked Gibbs models)."""

from .sampler import MCMCSampler, mcmc

__all__ = ["MCMCSampler", "mcmc"]
