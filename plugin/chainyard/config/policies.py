"""Config sections for what happens after sampling: targets, burn-in, thinning, run until
targets."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import (
    Field,
)

from chainyard.config._base import _Strict

# --------------------------------------------------------------------------- targets


class TargetsSpec(_Strict):
    """Convergence targets the verdict checks, in three questions (mixing, tau, precision).

    Sources and the simulations behind the defaults: :mod:`chainyard.decisions.targets`.
    """

    max_nested_rhat: float | None = Field(
        default=1.01,
        gt=1,
        description="Largest nested R-hat (replicas as superchains; Margossian et al. 2024).",
    )
    max_rhat: float | None = Field(
        default=None,
        gt=1,
        description="If set, largest classic R-hat across the replicas' walker-mean traces "
        "(always reported; not checked by default: it needs ~200 steps per tau on healthy runs).",
    )
    min_ess_bulk: float | None = Field(default=400, gt=0, description="Smallest bulk ESS.")
    min_ess_tail: float | None = Field(default=400, gt=0, description="Smallest tail ESS.")
    min_steps_per_tau: float | None = Field(
        default=50, gt=0, description="Smallest steps / autocorrelation time."
    )
    max_tau_growth: float | None = Field(
        default=1.3,
        gt=1,
        description="Largest tau(whole run) / tau(first half): above it tau is still growing.",
    )
    max_tail_rhat: float | None = Field(
        default=1.1,
        gt=1,
        description="Largest split R-hat of the replicas' tail-share traces (5% and 95% "
        "tails): do the replicas visit the tails equally?",
    )
    min_tail_move_ratio: float | None = Field(
        default=0.35,
        gt=0,
        lt=1,
        description="Smallest share of moves out of a parameter's lowest or highest 5% over "
        "the share of moves overall: below it the sampler can hardly move in that region "
        "(a funnel's neck).",
    )
    relative_precision: float | None = Field(
        default=None,
        gt=0,
        lt=1,
        description="If set, multivariate ESS must reach the minimum for this precision.",
    )

    def to_targets(self) -> Any:
        """The :class:`chainyard.decisions.Targets` of these settings."""
        from chainyard.decisions import Targets

        return Targets(
            max_nested_rhat=self.max_nested_rhat,
            max_rhat=self.max_rhat,
            min_ess_bulk=self.min_ess_bulk,
            min_ess_tail=self.min_ess_tail,
            min_steps_per_tau=self.min_steps_per_tau,
            max_tau_growth=self.max_tau_growth,
            max_tail_rhat=self.max_tail_rhat,
            min_tail_move_ratio=self.min_tail_move_ratio,
            mess_eps=self.relative_precision,
        )


# --------------------------------------------------------------------------- decisions


class DefaultBurnIn(_Strict):
    """Larger of the MSER-5 cut on the log-prob trace and ``multiple`` x max tau (capped)."""

    policy: Literal["default"]
    multiple: float = Field(default=2.0, gt=0, description="Multiple of the largest tau.")
    max_fraction: float = Field(
        default=0.5, gt=0, lt=1, description="Largest fraction of the run to discard."
    )


class FixedBurnIn(_Strict):
    """Discard a fixed number of steps."""

    policy: Literal["fixed"]
    steps: int = Field(ge=0, description="Steps to discard.")


class FractionBurnIn(_Strict):
    """Discard a fraction of the run."""

    policy: Literal["fraction"]
    fraction: float = Field(ge=0, lt=1, description="Fraction of the steps to discard.")


class TauBurnIn(_Strict):
    """Discard a multiple of the largest autocorrelation time."""

    policy: Literal["tau_multiple"]
    multiple: float = Field(default=5.0, gt=0, description="Multiple of the largest tau.")


class MserBurnIn(_Strict):
    """MSER truncation (White 1997) on the walker-mean log-prob trace."""

    policy: Literal["mser"]
    batch_size: int = Field(default=5, ge=1, description="MSER batch length (5: MSER-5).")
    max_fraction: float = Field(default=0.5, gt=0, lt=1, description="Largest cut fraction.")


class GewekeBurnIn(_Strict):
    """First candidate cut whose Geweke (1992) z-score is within ``z_crit``."""

    policy: Literal["geweke"]
    z_crit: float = Field(default=1.96, gt=0, description="Critical |z|.")
    max_fraction: float = Field(default=0.5, gt=0, lt=1, description="Largest cut fraction.")


BurnInSpec = Annotated[
    DefaultBurnIn | FixedBurnIn | FractionBurnIn | TauBurnIn | MserBurnIn | GewekeBurnIn,
    Field(discriminator="policy"),
]


class NoThinning(_Strict):
    """Keep every step (default; Link and Eaton 2012)."""

    policy: Literal["none"]


class FixedThinning(_Strict):
    """Keep every ``factor``-th step."""

    policy: Literal["fixed"]
    factor: int = Field(ge=1, description="Keep every factor-th step.")


class TauThinning(_Strict):
    """Keep about every ``fraction`` x tau-th step."""

    policy: Literal["tau"]
    fraction: float = Field(default=0.5, gt=0, description="Factor = fraction x max tau.")


class TargetThinning(_Strict):
    """Thin to about ``draws`` stored draws per replica."""

    policy: Literal["target_draws"]
    draws: int = Field(ge=1, description="Draws (steps x walkers) to keep per replica.")


class CostAwareThinning(_Strict):
    """Owen (2017): the factor maximising efficiency when using a draw costs ``cost_ratio``."""

    policy: Literal["cost_aware"]
    cost_ratio: float = Field(gt=0, description="Cost of using a draw / cost of making one.")


ThinningSpec = Annotated[
    NoThinning | FixedThinning | TauThinning | TargetThinning | CostAwareThinning,
    Field(discriminator="policy"),
]


class ExtendSpec(_Strict):
    """Run until targets: extend chunk by chunk until the per-replica targets hold."""

    check_every: int = Field(default=2000, ge=1, description="Steps between checks.")
    max_steps: int = Field(ge=1, description="Never run past this many steps.")
    max_seconds: float | None = Field(
        default=None, gt=0, description="Stop extending after this much wall time."
    )
