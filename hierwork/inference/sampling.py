"""One function over the NUTS engines: PyMC's own sampler and nutpie.

Which engine a plan gets is decided before sampling, by
:func:`hierwork.model.paths.choose_engine`. Progress: the engine's bar on a
terminal; otherwise (a log file, a batch child, a pipe) a plain line per chain
every :data:`LOG_EVERY` seconds and when the chain ends
(:class:`ProgressLog`), so an overnight log shows how far each chain got.
"""
from __future__ import annotations

import sys
import time
import warnings

from hierwork import runtime  # noqa: F401  (before PyMC)
from hierwork.model.paths import default_cores
from hierwork.interrupts import chain_context

import arviz as az
import numpy as np
import pymc as pm


#: Seconds between progress lines per chain when standard error is not a terminal.
LOG_EVERY = 30.0


class ProgressLog:
    """Plain progress lines for a log: per chain, iteration, elapsed time and divergences so far.

    ``update`` may be called on every iteration; it writes a line for a chain
    when ``every`` seconds have passed since that chain's last line, and always
    on its last iteration.

    Parameters
    ----------
    chains, warmup, draws : int
    stream : file, optional
        Default: standard error.
    every : float
        Seconds between a chain's lines.
    clock : callable
        Seconds (monotonic); replaceable in tests.
    """

    def __init__(self, chains: int, warmup: int, draws: int, stream=None, every: float = LOG_EVERY,
                 clock=time.monotonic):
        self.chains, self.warmup, self.total = chains, warmup, warmup + draws
        self.stream = stream if stream is not None else sys.stderr
        self.every, self.clock = every, clock
        self.start = clock()
        self.last = [self.start] * chains
        self.divergences = [0] * chains

    def update(self, chain: int, iteration: int, diverging: bool = False) -> None:
        """Chain ``chain`` (from 0) finished iteration ``iteration`` (from 1, warm-up included)."""
        if diverging and iteration > self.warmup:
            self.divergences[chain] += 1
        now = self.clock()
        if iteration >= self.total or now - self.last[chain] >= self.every:
            self.last[chain] = now
            self.write(chain, iteration, now)

    def write(self, chain: int, iteration: int, now: float) -> None:
        phase = "warm-up" if iteration <= self.warmup else "sampling"
        elapsed = int(now - self.start)
        print(f"chain {chain + 1}/{self.chains}: iteration {iteration}/{self.total} ({phase}), "
              f"{elapsed // 60}:{elapsed % 60:02d} elapsed, {self.divergences[chain]} divergences after warm-up",
              file=self.stream, flush=True)

    def pymc_callback(self, trace, draw) -> None:
        """``pm.sample``'s per-draw callback."""
        stats = draw.stats[0] if isinstance(draw.stats, list) else draw.stats
        self.update(draw.chain, draw.draw_idx + 1, bool(stats.get("diverging", False)))

    def follow_nutpie(self, sampler, poll: float = 1.0):
        """Wait for a non-blocking nutpie sampler, writing lines as they fall due; returns its trace.

        Progress is read from a copy of the trace so far (``inspect``): per chain,
        the warm-up and posterior iterations recorded and the divergences among
        the latter.
        """
        while not _finished(sampler):
            time.sleep(poll)
            if self.clock() - min(self.last) < self.every or _finished(sampler):
                continue
            with warnings.catch_warnings():  # early on, a chain has no posterior draws yet: ArviZ warns
                warnings.filterwarnings("ignore", message="More chains", category=UserWarning)
                trace = sampler.inspect()
            done = sum(np.isfinite(trace[g].energy.values).sum(axis=1)
                       for g in ("warmup_sample_stats", "sample_stats") if g in trace.groups())
            diverging = trace.sample_stats.diverging.values.sum(axis=1) if "sample_stats" in trace.groups() \
                else np.zeros(self.chains)
            now = self.clock()
            for chain in range(self.chains):
                self.divergences[chain] = int(diverging[chain])
                self.last[chain] = now
                self.write(chain, int(done[chain]), now)
        idata = sampler.wait()
        now = self.clock()
        diverging = idata.sample_stats.diverging.values.sum(axis=1)
        for chain in range(self.chains):
            self.divergences[chain] = int(diverging[chain])
            self.write(chain, self.total, now)
        return idata


def _finished(sampler) -> bool:
    """Whether a non-blocking nutpie sampler is done (its ``is_finished`` raises TimeoutError while busy)."""
    try:
        return bool(sampler.is_finished)
    except TimeoutError:
        return False


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
        ``True``: the engine's progress bar; ``False``: nothing; default: the bar
        when standard error is a terminal, else :class:`ProgressLog` lines on it.

    Returns
    -------
    arviz.InferenceData
        With ``posterior`` and ``sample_stats``; sampling wall time in
        ``sample_stats.attrs["sampling_seconds"]``.
    """
    chains = settings["chains"]
    if progress is None:
        progress = sys.stderr.isatty()
        log = None if progress else ProgressLog(chains, settings["warmup"], settings["draws"])
    else:
        log = None
    cores = default_cores(chains, settings.get("cores"))
    start = time.perf_counter()
    if engine == "nutpie":
        import nutpie

        compiled = nutpie.compile_pymc_model(model)
        sampled = nutpie.sample(compiled, draws=settings["draws"], tune=settings["warmup"], chains=chains,
                                cores=cores, seed=settings["seed"], target_accept=settings["target_accept"],
                                maxdepth=settings["max_treedepth"], progress_bar=progress, blocking=log is None)
        idata = sampled if log is None else log.follow_nutpie(sampled)
    else:
        idata = pm.sample(draws=settings["draws"], tune=settings["warmup"], chains=chains, cores=cores,
                          random_seed=settings["seed"], progressbar=progress, model=model,
                          nuts={"target_accept": settings["target_accept"],
                                "max_treedepth": settings["max_treedepth"]},
                          callback=log.pymc_callback if log else None,
                          compute_convergence_checks=False, idata_kwargs={"log_likelihood": False},
                          mp_ctx=chain_context())  # chains end with this process, however it ends
    idata.sample_stats.attrs["sampling_seconds"] = time.perf_counter() - start
    idata.sample_stats.attrs["engine"] = engine
    return idata
