"""Keyed random streams: the only place in simlab that turns seeds into generators."""

from __future__ import annotations

import zlib

import numpy as np

__all__ = ["PURPOSES", "stream", "label_key"]

# Stable integer codes for what a stream is used for.  Append new purposes at the
# end: changing an existing code would change every stored result.
PURPOSES = {
    "world": 0,      # the replicate's true objective (feature draw or grid draw)
    "design": 1,     # initial space-filling design and the `sobol` policy's sequence
    "noise": 2,      # observation noise, one draw per trial, shared by all policies
    "pool": 3,       # quasi-random candidate pool scored by acquisitions
    "policy": 4,     # a policy's own randomness (Thompson samples, random search)
    "optimum": 5,    # the search for the world's optimum
    "hyper": 6,      # the replicate's own world hyperparameters when they are uncertain
    "refit": 7,      # starting points of a campaign's belief refits (per policy)
    "optimum_check": 8,   # a second, independent search for the world's optimum (optimum_gap)
    "library": 9,    # the order a [candidates] library's rows are visited in (design, sobol policy)
    "stop": 10,      # posterior draws of the stopping rules' record (per policy), simlab.stopping.record
    "optimum_extra": 11,  # further searches for the optimum while two disagree (keyed by their number, as text)
    "limit": 12,     # a [[limit]]'s true quantity (keyed by the limit's name)
    "limit_noise": 13,    # a limit's measurement shocks, one per trial, shared by all policies (keyed by name)
    "fails": 14,     # the latent world of [world] fails_where
    "fails_level": 15,    # the Sobol' points that set the failing region's threshold
    "feasible_optimum": 16,   # the search for the best feasible input
    "feasible_check": 17,     # a second, independent search for it
}


def label_key(label: str) -> int:
    """A stable 32-bit key for a policy label (CRC-32 of its UTF-8 bytes).

    Keying by label rather than by position means adding or reordering policies in
    a study never changes the streams of the others.
    """
    return zlib.crc32(label.encode("utf-8"))


def stream(seed: int, replicate: int, purpose: str, policy: str | None = None) -> np.random.Generator:
    """Return the generator for one (replicate, purpose[, policy]) key.

    Parameters
    ----------
    seed : int
        The study's root seed.
    replicate : int
        0-based replicate index.
    purpose : str
        One of :data:`PURPOSES`.
    policy : str, optional
        Policy label, for streams that belong to one policy.

    Notes
    -----
    Streams are keyed with ``numpy.random.SeedSequence(seed, spawn_key=key)`` as NumPy's
    NEP 19 recommends, so any single replicate can be replayed exactly, in any order
    and on any worker, and no stream is derived by adding offsets to a seed.
    """
    if purpose not in PURPOSES:
        raise ValueError(f"purpose must be one of {sorted(PURPOSES)}; got {purpose!r}")
    key: tuple[int, ...] = (int(replicate), PURPOSES[purpose])
    if policy is not None:
        key += (label_key(policy),)
    return np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=key))
