"""Config sections for the model and its parameters: where log_prob and its data come from,
and each parameter's name, initialisation and bounds."""

from __future__ import annotations

import math
from typing import Annotated, Any

from pydantic import (
    BaseModel,
    Discriminator,
    Field,
    Tag,
    field_validator,
    model_validator,
)

from chainyard.config._base import _Strict

#: names of parameters and blobs (also used as store array names)
NAME_PATTERN = r"^[A-Za-z_][A-Za-z0-9_.\-]*$"

# --------------------------------------------------------------------------- model


class ModelSpec(_Strict):
    """Where the log-probability function and its data come from."""

    log_prob: str = Field(
        description=(
            "The log-probability function, as 'path/to/module.py:function' (path relative to "
            "the config file) or 'package.module:function' (importable). Called as "
            "log_prob(theta, data); theta has shape (params,), or (walkers, params) when "
            "'vectorized' is true."
        ),
        examples=["model.py:log_prob"],
    )
    data: str | None = Field(
        default=None,
        description=(
            "Optional data file (.csv with a header row, .npz, .json), relative to the config "
            "file; loaded once and passed as the second argument. None: data is None. CSV: "
            "UTF-8 without BOM, unique column names, at least one row, every row as long as "
            "the header; a column with any number must be all finite numbers (no empty or "
            "n/a cells), a column with no numbers is passed as labels (str). NPZ: no object "
            "arrays. JSON: standard JSON (no NaN/Infinity). Rules: chainyard.datafiles."
        ),
    )
    data_loader: str | None = Field(
        default=None,
        description=(
            "Optional function 'module.py:function' or 'package.module:function' called as "
            "loader(path) to load 'data' instead of the built-in readers."
        ),
    )
    vectorized: bool = Field(
        default=False,
        description=(
            "True if log_prob takes all walkers at once: theta (walkers, params) -> (walkers,)."
        ),
    )
    extra_sources: tuple[str, ...] = Field(
        default=(),
        description=(
            "Further source files (relative to the config file) whose content is part of the "
            "model's identity, e.g. helper modules the model imports."
        ),
    )

    call_time_limit_seconds: float | None = Field(
        default=None,
        gt=0,
        description=(
            "Optional limit on the wall time of one call of log_prob (seconds). A call that "
            "takes longer stops the run with a model error naming the step and walker; the "
            "finished steps stay committed. None: no limit. Does not change the draws."
        ),
    )
    check_deterministic: bool = Field(
        default=True,
        description=(
            "At the first commit, evaluate log_prob again at a few stored positions and stop "
            "if the results differ bitwise (a model that draws random numbers or reads the "
            "clock cannot be resumed exactly). Does not change the draws."
        ),
    )

    @field_validator("log_prob", "data_loader")
    @classmethod
    def _function_reference(cls, value: str | None) -> str | None:
        return function_reference(value)


def function_reference(value: str | None) -> str | None:
    """Check a 'path/to/module.py:function' or 'package.module:function' reference."""
    if value is None:
        return value
    module, sep, func = value.rpartition(":")
    if not sep or not module or not func.isidentifier():
        raise ValueError("must look like 'path/to/module.py:function' or 'package.module:function'")
    return value


# --------------------------------------------------------------------------- parameters


class NormalSpec(_Strict):
    loc: float = Field(description="Centre of the normal ball (parameter units).")
    scale: float = Field(gt=0, description="Standard deviation of the ball (parameter units).")


class UniformSpec(_Strict):
    low: float = Field(description="Lower edge of the box (parameter units).")
    high: float = Field(description="Upper edge of the box (parameter units).")

    @model_validator(mode="after")
    def _ordered(self) -> UniformSpec:
        if not self.high > self.low:
            raise ValueError(f"high ({self.high}) must be greater than low ({self.low})")
        return self


class NormalInit(_Strict):
    """Walkers start at loc + scale * N(0, 1)."""

    normal: NormalSpec


class UniformInit(_Strict):
    """Walkers start uniformly in [low, high)."""

    uniform: UniformSpec


def _init_kind(value: Any) -> str | None:
    if isinstance(value, dict) and len(value) == 1:
        return next(iter(value))
    if isinstance(value, BaseModel):
        return next(iter(type(value).model_fields))
    return None


InitSpec = Annotated[
    Annotated[NormalInit, Tag("normal")] | Annotated[UniformInit, Tag("uniform")],
    Discriminator(
        _init_kind,
        custom_error_type="init_kind",
        custom_error_message="must be exactly one of {normal: {loc, scale}} or "
        "{uniform: {low, high}}",
    ),
]


#: a bound may be infinite (an open side, like null); NaN is refused by the validator
_Bound = Annotated[float, Field(allow_inf_nan=True)]


class Parameter(_Strict):
    """One model parameter, in the order theta holds them."""

    name: str = Field(pattern=NAME_PATTERN, description="Parameter name.")
    init: InitSpec | None = Field(
        default=None,
        description=(
            "How walkers are initialised for this parameter. Required unless the sampler's "
            "'initial_positions' file is given."
        ),
    )
    bounds: tuple[_Bound | None, _Bound | None] | None = Field(
        default=None,
        description=(
            "Optional [low, high] support (either may be null, or -inf/+inf, for an open "
            "side). Outside it log_prob is -inf and the model is not called."
        ),
    )
    unit: str | None = Field(default=None, description="Unit for labels in plots and tables.")
    label: str | None = Field(default=None, description="Longer human label for plots.")
    reference_value: float | None = Field(
        default=None,
        allow_inf_nan=False,
        description=(
            "Optional known or expected value (a simulation's truth, a previous estimate), "
            "drawn on traces and marginals; never used in sampling or diagnostics."
        ),
    )

    @field_validator("bounds")
    @classmethod
    def _bounds_ordered(
        cls, value: tuple[float | None, float | None] | None
    ) -> tuple[float | None, float | None] | None:
        if value is not None:
            low, high = value
            if any(b is not None and math.isnan(b) for b in value):
                raise ValueError("NaN is not a bound; use a number, or null for an open side")
            if low is not None and high is not None and not high > low:
                raise ValueError(f"high ({high}) must be greater than low ({low})")
        return value
