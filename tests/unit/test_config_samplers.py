"""Config of the sampler kinds: the issue's three configs verbatim, defaults, mixed keys."""

from __future__ import annotations

import pytest
import yaml

from chainyard.config import parse_config
from chainyard.errors import ConfigError

# the three configs of the samplers issue, verbatim (outside tests write configs like these)
METROPOLIS = """
# random-walk Metropolis-Hastings: independent chains, each with its own stream
model: {log_prob: model.py:log_prob}
parameters:
  - {name: x, init: {normal: {loc: 0.0, scale: 1.0}}}
  - {name: y, init: {normal: {loc: 0.0, scale: 1.0}}}
sampler:
  kind: metropolis_hastings
  chains: 8
  steps: 20000
  proposal_sd: 0.8          # a number, or one per parameter
seed: 3
"""
KERNEL = """
# a user-written kernel, e.g. a Gibbs sweep: step(state, rng, data) -> new state
model: {log_prob: model.py:log_prob}
parameters:
  - {name: x, init: {normal: {loc: 0.0, scale: 1.0}}}
  - {name: y, init: {normal: {loc: 0.0, scale: 1.0}}}
sampler:
  kind: kernel
  kernel: gibbs.py:sweep
  chains: 8
  steps: 5000
seed: 3
"""
ACCEPT_REJECT = """
# accept-reject: exact independent draws under an envelope M * g(x) >= f(x)
model: {log_prob: model.py:log_prob}      # log f, unnormalised
parameters:
  - {name: x, init: {normal: {loc: 0.0, scale: 1.0}}}
sampler:
  kind: accept_reject
  envelope: {normal: {loc: 0.0, scale: 2.0}}   # g, one entry per parameter (normal or uniform)
  log_bound: 1.5                               # log M
  draws: 20000
  chains: 4
seed: 3
"""


@pytest.mark.parametrize(
    ("text", "kind", "walkers", "steps"),
    [
        (METROPOLIS, "metropolis_hastings", 8, 20000),
        (KERNEL, "kernel", 8, 5000),
        (ACCEPT_REJECT, "accept_reject", 4, 20000),
    ],
)
def test_issue_configs_are_valid(text: str, kind: str, walkers: int, steps: int) -> None:
    """Valid as written; walkers means chains, steps means draws for accept-reject."""
    config = parse_config(yaml.safe_load(text))
    assert config.sampler.kind == kind
    assert config.sampler.walkers == walkers and config.sampler.steps == steps
    assert config.with_steps(steps + 7).sampler.steps == steps + 7
    assert config.normalised()["sampler"]["kind"] == kind


def test_ensemble_stays_default_and_hash_stable() -> None:
    """No kind: the ensemble, and the normalised config holds no new key (stable hashes)."""
    data = yaml.safe_load(METROPOLIS)
    data["sampler"] = {"walkers": 8, "steps": 100}
    config = parse_config(data)
    assert config.sampler.kind == "ensemble"
    assert "kind" not in config.normalised()["sampler"]
    data["sampler"]["kind"] = "ensemble"
    assert parse_config(data).normalised() == config.normalised()


@pytest.mark.parametrize(
    ("change", "message"),
    [
        (
            {"walkers": 8},
            "sampler.walkers: not a setting of kind metropolis_hastings (it has chains, steps, "
            "proposal_sd, ...)",
        ),
        ({"envelope": {"normal": {"loc": 0, "scale": 1}}}, "sampler.envelope: not a setting"),
        ({"proposal_sd": [1.0, 2.0, 3.0]}, "sampler.proposal_sd has 3 values; need 1 or 2"),
        ({"kind": "hamiltonian"}, "sampler.kind = 'hamiltonian': must be one of ensemble"),
        ({"adapt_steps": -1}, "sampler.adapt_steps = -1"),
    ],
)
def test_bad_sampler_settings_are_one_line(change: dict, message: str) -> None:
    """A key of another kind (or a bad value) is one line naming the key."""
    data = yaml.safe_load(METROPOLIS)
    data["sampler"].update(change)
    with pytest.raises(ConfigError) as err:
        parse_config(data)
    lines = str(err.value).splitlines()
    assert len(lines) == 1 and message in lines[0], lines


def test_chains_under_the_ensemble_is_named() -> None:
    data = yaml.safe_load(METROPOLIS)
    data["sampler"] = {"walkers": 8, "steps": 10, "chains": 4}
    with pytest.raises(ConfigError, match=r"sampler.chains: not a setting of kind ensemble"):
        parse_config(data)


def test_envelope_entries_match_parameters() -> None:
    """One mapping for one parameter; otherwise a list with one entry per parameter."""
    data = yaml.safe_load(ACCEPT_REJECT)
    data["parameters"].append({"name": "y", "init": {"normal": {"loc": 0.0, "scale": 1.0}}})
    with pytest.raises(ConfigError, match="a single mapping is for one parameter"):
        parse_config(data)
    data["sampler"]["envelope"] = [{"uniform": {"low": -5, "high": 5}}] * 2
    assert len(parse_config(data).sampler.envelopes) == 2
