"""One independent random stream per chain, and its exact JSON record.

The samplers of independent chains (Metropolis-Hastings, user kernels, accept-reject) give
chain ``c`` of replica ``r`` the ``numpy.random.Generator`` over PCG64 seeded by
``SeedSequence(seed, spawn_key=(r, 1, c))``, which is exactly
``SeedSequence(seed, spawn_key=(r, 1)).spawn(chains)[c]``: the children of the replica's
sampler stream (:mod:`chainyard.streams`, NEP 19 spawning). A chain's stream is never shared.

The recorded state of every chain is the bit generator's own state with its 128-bit integers
written as hexadecimal text (JSON readers that turn large integers into floats cannot alter
them), so a resumed chain continues bit for bit.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from chainyard.streams import SAMPLER_STREAM, spawn_key

__all__ = [
    "chain_generators",
    "check_chain_states",
    "fresh_chain_states",
    "generator_from_json",
    "generator_to_json",
    "generators_from_json",
]


def chain_generators(seed: int, replica: int, chains: int) -> list[np.random.Generator]:
    """The fresh per-chain generators of one replica (see module docstring)."""
    parent = np.random.SeedSequence(seed, spawn_key=spawn_key(replica, SAMPLER_STREAM))
    return [np.random.Generator(np.random.PCG64(child)) for child in parent.spawn(chains)]


def fresh_chain_states(seed: int, replica: int, chains: int) -> list[dict[str, Any]]:
    """The JSON records of every chain's fresh stream (see :func:`chain_generators`)."""
    return [generator_to_json(g) for g in chain_generators(seed, replica, chains)]


def generator_to_json(gen: np.random.Generator) -> dict[str, Any]:
    """A generator's PCG64 state as plain JSON values (exact round trip)."""
    st = gen.bit_generator.state
    if st.get("bit_generator") != "PCG64":
        raise ValueError(f"only PCG64 chain streams are supported, got {st.get('bit_generator')}")
    return {
        "state": format(int(st["state"]["state"]), "x"),
        "inc": format(int(st["state"]["inc"]), "x"),
        "has_uint32": int(st["has_uint32"]),
        "uinteger": int(st["uinteger"]),
    }


def generator_from_json(data: Any) -> np.random.Generator:
    """Rebuild a generator from :func:`generator_to_json` output.

    Raises
    ------
    ValueError
        If the record is malformed.
    """
    try:
        state = {
            "bit_generator": "PCG64",
            "state": {"state": int(data["state"], 16), "inc": int(data["inc"], 16)},
            "has_uint32": int(data["has_uint32"]),
            "uinteger": int(data["uinteger"]),
        }
        bits = np.random.PCG64()
        bits.state = state
    except (KeyError, TypeError, ValueError) as exc:
        raise ValueError(f"malformed chain random state: {exc}") from None
    return np.random.Generator(bits)


def generators_from_json(data: Any, chains: int) -> list[np.random.Generator]:
    """Every chain's generator from a driver record's ``chains`` list (one per chain)."""
    if not isinstance(data, list) or len(data) != chains:
        raise ValueError(f"malformed chain random states: expected a list of {chains}")
    return [generator_from_json(item) for item in data]


def check_chain_states(record: Any) -> None:
    """Raise ValueError if a chain kind's stored random-state record is malformed."""
    chains = record.get("chains") if isinstance(record, dict) else None
    if not isinstance(chains, list) or not chains:
        raise ValueError("malformed chain random states: expected a list")
    for item in chains:
        generator_from_json(item.get("block_start", item) if isinstance(item, dict) else None)
