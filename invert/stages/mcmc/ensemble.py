"""The emcee ensembles of the MCMC stage.

emcee ensembles of the MCMC stage: the moves, lockstep runs to a length set by the
autocorrelation time, and burn-in and thinning.

References
----------
.. [1] D. Foreman-Mackey, D. W. Hogg, D. Lang and J. Goodman, "emcee: the MCMC hammer",
       PASP 125:306–312, 2013. doi:10.1086/670067
.. [2] C. J. F. ter Braak, "A Markov chain Monte Carlo version of the genetic algorithm
       differential evolution", Stat. Comput. 16:239–249, 2006. doi:10.1007/s11222-006-8769-1
"""

from __future__ import annotations

import numpy as np

from .chains import autocorr_max, progress_bar

__all__ = ["moves_for", "run_emcee", "thin_chains"]


def moves_for(d):
    """Emcee moves for a ``d``-dimensional posterior, and their description.

    Differential evolution (ter Braak 2006) everywhere: on these posteriors its
    autocorrelation time was about 4x shorter than the stretch move's in our runs. Up to 3
    dimensions (the hyperparameters of the collapsed sampler), 80 % of the steps are
    independence proposals from a Student-t fitted to the complementary half-ensemble
    (:class:`~invert.stages.mcmc.moves.FittedStudentMove`), which cut the autocorrelation time
    from about 4.4 to 1.5-2 steps; in 24 dimensions (the all-coefficient baseline) that
    proposal was accepted 3 % of the time, so it is not used there. emcee's DESnookerMove is
    not used: mixed in at 20 % it gave posterior sds 7 % too small on a 17-dimensional
    Gaussian with known answer (emcee 3.1.6).
    """
    import emcee

    from .moves import FittedStudentMove

    if d <= 3:
        return ([(FittedStudentMove(), 0.8), (emcee.moves.DEMove(), 0.2)],
                "80 % fitted Student-t independence, 20 % differential-evolution moves")
    return emcee.moves.DEMove(), "differential-evolution moves"


def run_emcee(logp, centres, ball, nwalkers, rng, *, max_steps, min_steps, check_every,
               progress, desc):
    """Run emcee ensembles in lockstep until the chains are long enough.

    Run one emcee ensemble per row of ``centres`` in lockstep until each chain is at least
    50 autocorrelation times long (after dropping the first quarter) or ``max_steps``.
    """
    import emcee

    K, d = centres.shape
    samplers, states = [], []
    for k in range(K):
        p0 = centres[k] + ball * rng.standard_normal((nwalkers, d))
        for _ in range(50):
            bad = ~np.isfinite(logp(p0))
            if not bad.any():
                break
            p0[bad] = centres[k] + 0.1 * ball * rng.standard_normal((int(bad.sum()), d))
        else:
            raise RuntimeError("could not place the walkers where the posterior is positive")
        sampler = emcee.EnsembleSampler(nwalkers, d, logp, vectorize=True,
                                        moves=moves_for(d)[0])
        seed = int(rng.integers(2**32))
        states.append(emcee.State(p0, random_state=np.random.RandomState(seed).get_state()))
        samplers.append(sampler)
    n, tau, converged = 0, np.inf, False
    next_check = max(min_steps, check_every)
    with progress_bar(max_steps, progress, desc) as bar:
        while n < max_steps:
            step = int(min(check_every, max_steps - n))
            for k in range(K):
                states[k] = samplers[k].run_mcmc(states[k], step, progress=False)
            n += step
            bar.update(step)
            if n >= next_check or n >= max_steps:
                # Checks at a geometric schedule (every 25 % growth): the autocorrelation
                # estimate costs one FFT per walker and parameter.
                next_check = max(n + check_every, int(1.25 * n))
                tau = max(autocorr_max(s.get_chain()[n // 4:]) for s in samplers)
                if n - n // 4 >= 50 * tau:
                    converged = True
                    break
    chains = np.stack([s.get_chain() for s in samplers])  # (K, n, nwalkers, d)
    acc = float(np.mean([s.acceptance_fraction.mean() for s in samplers]))
    return chains, {"n_steps": n, "tau_int": tau, "converged": converged, "acceptance": acc}


def thin_chains(chains, n_draws, min_per_chain=20):
    """Drop the burn-in and thin the chains to about ``n_draws`` draws.

    Drop the first quarter (>= 12 autocorrelation times once converged) and thin each walker
    to equal length so that all walkers together keep about ``n_draws`` draws.

    Returns an array (K * nwalkers, n_keep, d), superchain ids, burn and thin.
    """
    K, n, nw, d = chains.shape
    burn = n // 4
    kept = chains[:, burn:]
    per = max(min_per_chain, int(np.ceil(n_draws / (K * nw))))
    thin = max(1, kept.shape[1] // per)
    kept = kept[:, ::thin][:, -per:]  # (K, n_keep, nw, d)
    out = np.moveaxis(kept, 2, 1).reshape(K * nw, kept.shape[1], d)
    ids = np.repeat(np.arange(K), nw)
    return out, ids, burn, thin
