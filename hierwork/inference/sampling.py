"""One function over the NUTS engines: PyMC's own sampler and nutpie.

Which engine a plan gets is decided before sampling, by
:func:`hierwork.model.paths.choose_engine`.
"""
from __future__ import annotations

import os
import sys
import time

from hierwork import runtime  # noqa: F401  (before PyMC)
from hierwork.interrupts import chain_context

import arviz as az
import pymc as pm


def default_cores(chains: int, requested: int | None) -> int:
    """Processes for chains: the request, or one per chain up to the CPU count."""
    if requested:
        return requested
    return max(1, min(chains, os.cpu_count() or 1))


def run_sampler(model: pm.Model, settings: dict, engine: str, progress: bool | None = None) -> az.InferenceData:
    """Sample a model with NUTS.

    Parameters
    ----------
    model : pymc.Model
    settings : dict
        The spec's ``sampling`` section (chains, warmup, draws, target_accept,
        max_treedepth, seed, cores).
    engine : {"pymc", "nutpie"}
    progress : bool, optional
        Show a progress bar; default: when standard error is a terminal.

    Returns
    -------
    arviz.InferenceData
        With ``posterior`` and ``sample_stats``; sampling wall time in
        ``sample_stats.attrs["sampling_seconds"]``.
    """
    if progress is None:
        progress = sys.stderr.isatty()
    chains = settings["chains"]
    cores = default_cores(chains, settings.get("cores"))
    start = time.perf_counter()
    if engine == "nutpie":
        import nutpie

        compiled = nutpie.compile_pymc_model(model)
        idata = nutpie.sample(compiled, draws=settings["draws"], tune=settings["warmup"], chains=chains,
                              cores=cores, seed=settings["seed"], target_accept=settings["target_accept"],
                              maxdepth=settings["max_treedepth"], progress_bar=progress)
    else:
        idata = pm.sample(draws=settings["draws"], tune=settings["warmup"], chains=chains, cores=cores,
                          random_seed=settings["seed"], progressbar=progress, model=model,
                          nuts={"target_accept": settings["target_accept"],
                                "max_treedepth": settings["max_treedepth"]},
                          compute_convergence_checks=False, idata_kwargs={"log_likelihood": False},
                          mp_ctx=chain_context())  # chains end with this process, however it ends
    idata.sample_stats.attrs["sampling_seconds"] = time.perf_counter() - start
    idata.sample_stats.attrs["engine"] = engine
    return idata
