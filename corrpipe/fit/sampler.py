"""emcee sampling with a resumable HDF5 progress file and an autocorrelation stopping rule."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import emcee
import h5py
import numpy as np
from tqdm.auto import tqdm

from corrpipe.errors import CheckpointError, InputError
from corrpipe.terminal import show_bars

__all__ = ["ChainResult", "run_chain", "CHAIN_GROUP"]

CHAIN_GROUP = "chain"
_HASH_ATTR = "corrpipe_model_hash"
_TAU_ATTR = "corrpipe_last_tau"


@dataclass
class ChainResult:
    """A finished (or capped) MCMC run.

    Attributes
    ----------
    chain : ndarray, shape (n_steps, n_walkers, n_dim)
    log_prob : ndarray, shape (n_steps, n_walkers)
    tau : ndarray, shape (n_dim,)
        Integrated autocorrelation time per parameter, in steps (emcee.autocorr).
    converged : bool
        n_steps > tau_factor * max(tau) and tau stable to ``tau_tolerance`` between checks.
    burn, thin : int
        Steps discarded (2 max tau) and thinning (max(1, min tau / 2)) of :meth:`samples`.
    acceptance : float
        Mean acceptance fraction.
    resumed_from : int
        Steps read back from the progress file (0 for a fresh chain).
    note : str
        Why sampling stopped, and any restart of the progress file.
    """

    chain: np.ndarray
    log_prob: np.ndarray
    tau: np.ndarray
    converged: bool
    burn: int
    thin: int
    acceptance: float
    resumed_from: int = 0
    note: str = ""
    tau_history: list = field(default_factory=list)

    @property
    def n_steps(self) -> int:
        """Steps per walker."""
        return int(self.chain.shape[0])

    def samples(self) -> np.ndarray:
        """Flat samples after burn-in and thinning, shape (n_samples, n_dim)."""
        kept = self.chain[self.burn::self.thin]
        if kept.shape[0] == 0:
            kept = self.chain[-1:]
        return kept.reshape(-1, self.chain.shape[2])

    def sample_log_prob(self) -> np.ndarray:
        """Log posterior of :meth:`samples`."""
        kept = self.log_prob[self.burn::self.thin]
        if kept.shape[0] == 0:
            kept = self.log_prob[-1:]
        return kept.reshape(-1)


def _autocorr(chain: np.ndarray) -> np.ndarray:
    """Integrated autocorrelation time per parameter (emcee.autocorr, no length check)."""
    if chain.shape[0] < 4:
        return np.full(chain.shape[2], np.inf)
    return np.asarray(emcee.autocorr.integrated_time(chain, quiet=True, tol=0))


def _open_backend(path: Path, n_walkers: int, n_dim: int, model_hash: str) -> tuple[
        emcee.backends.HDFBackend, str]:
    """Open (or create) the progress file; restart it if it belongs to another fit."""
    note = ""
    backend = emcee.backends.HDFBackend(str(path), name=CHAIN_GROUP)
    if path.exists():
        try:
            with h5py.File(path, "r") as f:
                group = f.get(CHAIN_GROUP)
                stored_hash = None if group is None else group.attrs.get(_HASH_ATTR)
                shape = None if group is None else (int(group.attrs["nwalkers"]),
                                                    int(group.attrs["ndim"]))
        except (OSError, KeyError) as exc:
            note = f"progress file {path} was unreadable ({exc}); restarted the chain. "
            path.unlink()
            stored_hash, shape = None, None
        if stored_hash is not None:
            if shape != (n_walkers, n_dim):
                note += (f"progress file {path} holds a chain of shape (walkers, parameters) = "
                         f"{shape}, this fit needs {(n_walkers, n_dim)}; restarted the chain. ")
            elif stored_hash != model_hash:
                note += (f"progress file {path} holds a chain for other fit settings or data "
                         f"(hash {stored_hash} != {model_hash}); restarted the chain. ")
            else:
                return backend, note
        elif path.exists() and not note:
            note += f"progress file {path} holds no corrpipe chain; restarted it. "
    backend.reset(n_walkers, n_dim)
    with h5py.File(path, "a") as f:
        f[CHAIN_GROUP].attrs[_HASH_ATTR] = model_hash
    return backend, note


def run_chain(log_prob: Callable[[np.ndarray], float], start: np.ndarray, *,
              n_walkers: int = 32, seed: int = 1, progress_path: str | Path | None = None,
              model_hash: str = "", max_steps: int = 20000, check_every: int = 200,
              tau_factor: float = 50.0, tau_tolerance: float = 0.02,
              init_scale: np.ndarray | float = 1e-3, progress: bool = True,
              moves=None, log_prob_many: Callable[[np.ndarray], np.ndarray] | None = None,
              label: str = "fit") -> ChainResult:
    """Sample a posterior with emcee until the autocorrelation rule is met, resumably.

    Parameters
    ----------
    log_prob : callable
        Log posterior of a parameter vector (-inf outside the prior).
    start : ndarray, shape (n_dim,)
        Centre of the initial walker ball (a maximum-posterior point).
    n_walkers : int
        Number of walkers (at least 2 n_dim).
    seed : int
        Seed of the walker ball and of emcee's own generator; the same seed gives the same
        chain, and an interrupted chain resumed from its progress file equals an
        uninterrupted one (emcee stores its generator state at every step).
    progress_path : str or Path, optional
        emcee HDF5 backend file. If it holds a chain with the same (n_walkers, n_dim) and
        ``model_hash``, sampling continues from its last step; otherwise it is restarted.
    model_hash : str
        Identifies the posterior (settings and data), stored with the chain.
    max_steps : int
        Cap on steps per walker (convergence is flagged, not forced).
    check_every : int
        Steps between convergence checks.
    tau_factor, tau_tolerance : float
        Converged when steps > tau_factor * max(tau) and |delta tau| / tau < tau_tolerance
        (the stopping rule of the emcee documentation, "Saving & monitoring progress";
        common practice).
    init_scale : float or ndarray
        Gaussian width of the initial ball around ``start`` per parameter.
    progress : bool
        Show a tqdm bar.
    moves : optional
        emcee moves (default: emcee's stretch move); e.g. a differential-evolution mixture
        for curved posteriors.
    log_prob_many : callable, optional
        Vectorised log posterior of an (n, n_dim) array of points (emcee ``vectorize``);
        ``log_prob`` is still used for single points.
    label : str
        Names the caller in messages and the progress bar (``fit``, ``cosmology``).

    Returns
    -------
    ChainResult
    """
    start = np.asarray(start, dtype=float)
    n_dim = start.size
    if n_walkers < 2 * n_dim:
        raise InputError(f"{label}: n_walkers = {n_walkers} must be at least twice the number "
                         f"of sampled parameters ({n_dim}); raise {label}.n_walkers")
    note = ""
    stored_chain = np.empty((0, n_walkers, n_dim))
    stored_lp = np.empty((0, n_walkers))
    stored_accepted = np.zeros(n_walkers)
    path = None
    resume_state = None
    if progress_path is not None:
        path = Path(progress_path)
        path.parent.mkdir(parents=True, exist_ok=True)
        try:
            backend, note = _open_backend(path, n_walkers, n_dim, model_hash)
            if backend.iteration > 0:
                stored_chain = backend.get_chain()
                stored_lp = backend.get_log_prob()
                stored_accepted = np.asarray(backend.accepted, dtype=float)
                resume_state = backend.random_state
        except OSError as exc:
            raise CheckpointError(f"{label}: cannot open the progress file {path}: {exc}") from exc
    # Sampling runs in memory, chunk by chunk; each finished chunk is appended to the
    # progress file in emcee's HDF5 backend layout (one file open per chunk, not per step).
    if log_prob_many is not None:
        sampler = emcee.EnsembleSampler(n_walkers, n_dim, log_prob_many, moves=moves,
                                        vectorize=True)
    else:
        sampler = emcee.EnsembleSampler(n_walkers, n_dim, log_prob, moves=moves)
    resumed_from = stored_chain.shape[0]
    tau_history: list = []
    if resumed_from > 0:
        last_tau = _read_last_tau(path)
        if last_tau is not None:
            tau_history.append(last_tau)
        sampler.random_state = tuple(resume_state)
        state = emcee.State(stored_chain[-1].copy(), log_prob=stored_lp[-1].copy(),
                            random_state=sampler.random_state)
        note += f"resumed from step {resumed_from}. "
    else:
        rng = np.random.default_rng(seed)
        scale = np.broadcast_to(np.asarray(init_scale, dtype=float), (n_dim,))
        if not np.isfinite(log_prob(start)):
            raise InputError(f"{label}: the starting point has zero prior or likelihood; check "
                             f"the priors ({'alpha range, B range' if label == 'fit' else 'bounds'})"
                             " and the data")
        coords = start + scale * rng.standard_normal((n_walkers, n_dim))
        for i in range(n_walkers):  # keep every walker inside the prior
            tries = 0
            while not np.isfinite(log_prob(coords[i])) and tries < 100:
                coords[i] = start + 0.1 * scale * rng.standard_normal(n_dim)
                tries += 1
        sampler.random_state = np.random.RandomState(seed).get_state()
        state = emcee.State(coords, random_state=sampler.random_state)

    def full_chain() -> np.ndarray:
        if sampler.iteration == 0:
            return stored_chain
        return np.concatenate([stored_chain, sampler.get_chain()])

    done = resumed_from
    converged, tau = False, np.full(n_dim, np.inf)
    reason = ""
    bar = tqdm(total=max_steps, initial=min(done, max_steps), desc=f"{label}: sampling",
               unit="step", disable=not show_bars(progress), leave=False)
    try:
        while True:
            if done > 0 and (done % check_every == 0 or done >= max_steps):
                tau = _autocorr(full_chain())
                stable = bool(tau_history) and bool(np.all(
                    np.abs(tau - tau_history[-1]) < tau_tolerance * tau))
                tau_history.append(tau.copy())
                _write_last_tau(path, tau)
                if np.all(np.isfinite(tau)) and done > tau_factor * np.max(tau) and stable:
                    converged = True
                    reason = (f"converged after {done} steps ({done / np.max(tau):.0f} "
                              f"x max tau = {np.max(tau):.1f})")
                    break
                if done >= max_steps:
                    reason = (f"NOT converged: reached max_steps = {max_steps} with max tau "
                              f"= {np.max(tau):.1f} (need {tau_factor:g} x tau steps and a "
                              f"stable tau); raise {label}.max_steps")
                    break
            n_next = min(check_every - done % check_every, max_steps - done)
            accepted_before = np.array(sampler.backend.accepted, dtype=float) \
                if sampler.iteration else np.zeros(n_walkers)
            for state in sampler.sample(state, iterations=n_next, store=True):
                pass
            if path is not None:
                _append_chunk(path, sampler.get_chain()[-n_next:],
                              sampler.get_log_prob()[-n_next:],
                              np.asarray(sampler.backend.accepted, dtype=float)
                              - accepted_before, sampler.random_state)
            bar.update(n_next)
            done = resumed_from + sampler.iteration
    finally:
        bar.close()
    chain = full_chain()
    lp = stored_lp if sampler.iteration == 0 else np.concatenate([stored_lp,
                                                                   sampler.get_log_prob()])
    finite_tau = tau if np.all(np.isfinite(tau)) else np.full(n_dim, chain.shape[0] / 10.0)
    burn = int(min(2 * np.max(finite_tau), chain.shape[0] // 2))
    thin = max(1, int(0.5 * np.min(finite_tau)))
    accepted = stored_accepted + (np.asarray(sampler.backend.accepted, dtype=float)
                                  if sampler.iteration else 0.0)
    accept = float(np.mean(accepted) / max(chain.shape[0], 1))
    return ChainResult(chain=chain, log_prob=lp, tau=tau, converged=converged, burn=burn,
                       thin=thin, acceptance=accept, resumed_from=resumed_from,
                       note=(note + reason).strip(), tau_history=tau_history)


def _append_chunk(path: Path, chain: np.ndarray, log_prob: np.ndarray, accepted: np.ndarray,
                  random_state) -> None:
    """Append finished steps in emcee's HDF5 layout: data first, the iteration counter last."""
    with h5py.File(path, "a") as f:
        g = f[CHAIN_GROUP]
        it = int(g.attrs["iteration"])
        n = chain.shape[0]
        g["chain"].resize(it + n, axis=0)
        g["log_prob"].resize(it + n, axis=0)
        g["chain"][it:it + n] = chain
        g["log_prob"][it:it + n] = log_prob
        g["accepted"][:] += accepted
        for i, v in enumerate(random_state):
            g.attrs[f"random_state_{i}"] = v
        g.attrs["iteration"] = it + n


def _read_last_tau(path) -> np.ndarray | None:
    if path is None:
        return None
    with h5py.File(path, "r") as f:
        value = f[CHAIN_GROUP].attrs.get(_TAU_ATTR)
    return None if value is None else np.asarray(value, dtype=float)


def _write_last_tau(path, tau: np.ndarray) -> None:
    if path is None:
        return
    with h5py.File(path, "a") as f:
        f[CHAIN_GROUP].attrs[_TAU_ATTR] = np.asarray(tau, dtype=float)
