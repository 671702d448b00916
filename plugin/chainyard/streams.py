"""Seeded, independent random streams per replica (NEP 19 SeedSequence spawning).

Every replica ``r`` of a run with root seed ``s`` owns the stream
``SeedSequence(s, spawn_key=(r,))``, which is exactly ``SeedSequence(s).spawn(r + 1)[r]``.
Inside a replica two child streams are used, each for one job:

* ``(r, 0)``: drawing the walkers' initial positions (a ``numpy.random.Generator``);
* ``(r, 1)``: the sampler's proposals (a legacy ``RandomState`` over MT19937, the kind emcee
  3.1 draws from).

The global numpy RNG is never used.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = [
    "INIT_STREAM",
    "SAMPLER_STREAM",
    "init_generator",
    "random_state_from_json",
    "random_state_to_json",
    "sampler_random_state",
    "spawn_key",
]

INIT_STREAM = 0
SAMPLER_STREAM = 1


def spawn_key(replica: int, purpose: int) -> tuple[int, int]:
    """Spawn key of one child stream of a replica (see module docstring)."""
    if replica < 0:
        raise ValueError(f"replica must be >= 0, got {replica}")
    return (int(replica), int(purpose))


def init_generator(seed: int, replica: int) -> np.random.Generator:
    """Generator used to draw the initial walker positions of one replica."""
    seq = np.random.SeedSequence(seed, spawn_key=spawn_key(replica, INIT_STREAM))
    return np.random.Generator(np.random.PCG64(seq))


def sampler_random_state(seed: int, replica: int) -> np.random.RandomState:
    """Legacy RandomState (MT19937) driving the sampler's proposals for one replica."""
    seq = np.random.SeedSequence(seed, spawn_key=spawn_key(replica, SAMPLER_STREAM))
    return np.random.RandomState(np.random.MT19937(seq))


def random_state_to_json(state: tuple[Any, ...]) -> dict[str, Any]:
    """Encode a ``RandomState.get_state()`` tuple as plain JSON values (exact round trip)."""
    name, key, pos, has_gauss, cached = state
    if name != "MT19937":
        raise ValueError(f"only MT19937 states are supported, got {name!r}")
    return {
        "bit_generator": str(name),
        "key": [int(k) for k in np.asarray(key, dtype=np.uint32)],
        "pos": int(pos),
        "has_gauss": int(has_gauss),
        "cached_gaussian": float(cached),
    }


def random_state_from_json(data: dict[str, Any]) -> tuple[Any, ...]:
    """Decode :func:`random_state_to_json` output into a ``set_state`` tuple.

    Raises
    ------
    ValueError
        If the record is malformed (wrong generator, key length or types).
    """
    try:
        key = np.asarray(data["key"], dtype=np.uint32)
        state = (
            str(data["bit_generator"]),
            key,
            int(data["pos"]),
            int(data["has_gauss"]),
            float(data["cached_gaussian"]),
        )
    except (KeyError, TypeError, ValueError) as exc:
        raise ValueError(f"malformed random state record: {exc}") from None
    if state[0] != "MT19937" or key.shape != (624,):
        raise ValueError("malformed random state record: expected MT19937 with 624 key words")
    return state


def states_equal(a: tuple[Any, ...], b: tuple[Any, ...]) -> bool:
    """True if two ``get_state()`` tuples describe the same generator state."""
    return (
        a[0] == b[0]
        and np.array_equal(np.asarray(a[1]), np.asarray(b[1]))
        and int(a[2]) == int(b[2])
        and int(a[3]) == int(b[3])
        and float(a[4]) == float(b[4])
    )
