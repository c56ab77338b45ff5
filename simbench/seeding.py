"""Random streams by task identity: the one seeding rule of the project (ARCHITECTURE.md).

Every random draw (measurement noise, a random phantom family's sample, a dataset sample's
noise) comes from ``rng_for(root_seed, *identity)``, whose stream depends only on the root
seed and the task's identity, never on the order of execution, the worker or the thread
count. This module sits below every package that draws random numbers and imports only
numpy and the standard library.
"""

from __future__ import annotations

import hashlib

import numpy as np


def identity_key(*identity) -> tuple[int, ...]:
    """A stable spawn key (four 32-bit words) from the parts of a task's identity.

    Parameters
    ----------
    *identity : str, int, float or tuple
        The parts (e.g. ``"quickstart", "dose=0.5", 3, "measure"``). Their ``repr`` is hashed
        with SHA-256, so the key is the same in every process and Python version (Python's
        own ``hash`` of strings is salted per process and is not used).

    Returns
    -------
    tuple of int
    """
    text = "\x1f".join(f"{type(part).__name__}:{part!r}" for part in identity)
    digest = hashlib.sha256(text.encode("utf-8")).digest()
    return tuple(int.from_bytes(digest[i:i + 4], "little") for i in range(0, 16, 4))


def rng_for(root_seed: int, *identity) -> np.random.Generator:
    """The random stream of one task: ``Generator(PCG64(SeedSequence(root_seed, spawn_key)))``.

    Parameters
    ----------
    root_seed : int
        The scenario's root seed (non-negative).
    *identity
        The task's identity; see :func:`identity_key`.

    Returns
    -------
    numpy.random.Generator

    Examples
    --------
    >>> a = rng_for(7, "scan", 0).standard_normal(3)
    >>> b = rng_for(7, "scan", 0).standard_normal(3)
    >>> bool((a == b).all())
    True
    """
    seq = np.random.SeedSequence(int(root_seed), spawn_key=identity_key(*identity))
    return np.random.Generator(np.random.PCG64(seq))
