"""Generate the example workflow's synthetic measurement data (seeded, reproducible).

Two invented experiments from a materials-testing lab:

``data/cooling.csv``
    An alumina test coupon cooling inside a box furnace after the heater is switched
    off, read by a type-K thermocouple every 2.5 min for 120 min (about three time
    constants). Columns: ``t_min`` (minutes since heater off), ``T_degC`` (reading,
    logger resolution 0.1 degC). Lumped-capacitance (Newton) cooling with Gaussian
    read-out noise::

        T(t) = T_ambient + (T_start - T_ambient) * exp(-t / tau) + N(0, sigma^2)

``data/source_scan.csv``
    A sealed check source lost inside a stack of ceramic tiles lying along the x axis
    (centre at x = 0). Without unstacking, a count-rate probe is raised step by step
    along the perpendicular through the stack centre (height ``y_cm`` above the source
    line) and counts for ``live_s`` seconds at each height. Columns: ``y_cm``, ``live_s``,
    ``counts``. Expected counts::

        live_s * (bkg + R1 * (100 cm)^2 / (x_src^2 + y^2))

    The data depend on ``x_src`` only through ``x_src^2``: a source at +x and one at -x
    give identical counts, so the posterior has two mirror-image modes.

The true parameters are written to ``data/truth.json``. Randomness comes from one
``numpy.random.Generator`` per dataset, spawned from a fixed root seed (no global
RNG), and every number is written with a fixed format, so running this script twice
gives byte-identical files (for a given numpy version).

Usage: ``python scripts/make_data.py [--outdir DIR]`` (default: ``data/`` next to
``scripts/``).
"""

from __future__ import annotations

import argparse
import json
import math
from pathlib import Path

import numpy as np

ROOT_SEED = 20261201

COOLING = {
    "T_ambient": 23.4,  # degC, furnace surroundings / lab air
    "T_start": 847.0,  # degC, coupon temperature when the heater switched off
    "tau_min": 38.5,  # min, lumped-capacitance time constant
    "sigma": 2.5,  # degC, thermocouple + logger noise sd
}
COOLING_TIMES = np.arange(49) * 2.5  # 0, 2.5, ..., 120 min

SOURCE = {
    "x_src": 35.0,  # cm along the stack from its centre (the sign is not identifiable)
    "R1": 8.0,  # counts/s the source alone gives at 1 m
    "bkg": 1.2,  # counts/s background
}
SOURCE_HEIGHTS = np.array(
    [5, 8, 11, 14, 17, 20, 24, 28, 32, 36, 40, 45, 50, 55, 60, 70, 80, 90, 100, 120],
    dtype=np.float64,
)  # cm above the source line
SOURCE_LIVE_S = 100.0  # s counted at each height


def cooling_table(rng: np.random.Generator) -> list[str]:
    """Rows of data/cooling.csv (header first)."""
    p = COOLING
    t = COOLING_TIMES
    mean = p["T_ambient"] + (p["T_start"] - p["T_ambient"]) * np.exp(-t / p["tau_min"])
    reading = np.round(mean + rng.normal(0.0, p["sigma"], size=t.size), 1)
    return ["t_min,T_degC"] + [f"{ti:.1f},{ri:.1f}" for ti, ri in zip(t, reading, strict=True)]


def source_table(rng: np.random.Generator) -> list[str]:
    """Rows of data/source_scan.csv (header first)."""
    p = SOURCE
    y = SOURCE_HEIGHTS
    rate = p["bkg"] + p["R1"] * 100.0**2 / (p["x_src"] ** 2 + y**2)
    counts = rng.poisson(SOURCE_LIVE_S * rate)
    return ["y_cm,live_s,counts"] + [
        f"{yi:.1f},{SOURCE_LIVE_S:.1f},{int(ci)}" for yi, ci in zip(y, counts, strict=True)
    ]


def truth() -> dict:
    """True parameter values, named and parameterised as in config/runs.yaml."""
    return {
        "generator": "scripts/make_data.py",
        "root_seed": ROOT_SEED,
        "runs": {
            "cooling": {
                "data": "data/cooling.csv",
                "parameters": {
                    "T_ambient": COOLING["T_ambient"],
                    "T_start": COOLING["T_start"],
                    "log_tau": math.log(COOLING["tau_min"]),
                    "sigma": COOLING["sigma"],
                },
                "derived": {"tau_min": COOLING["tau_min"]},
                "units": {
                    "T_ambient": "degC",
                    "T_start": "degC",
                    "log_tau": "ln(min)",
                    "sigma": "degC",
                },
            },
            "mirror_source": {
                "data": "data/source_scan.csv",
                "parameters": {
                    "x_src": SOURCE["x_src"],
                    "log_R1": math.log(SOURCE["R1"]),
                    "bkg": SOURCE["bkg"],
                },
                "derived": {"R1": SOURCE["R1"], "mirror_x_src": -SOURCE["x_src"]},
                "units": {"x_src": "cm", "log_R1": "ln(counts/s)", "bkg": "counts/s"},
                "note": "the data cannot tell x_src from -x_src; both are exact solutions",
            },
        },
    }


def write_text(path: Path, text: str) -> None:
    # Fixed "\n" line endings on every platform, so the bytes do not depend on the OS.
    with open(path, "w", encoding="utf-8", newline="\n") as f:
        f.write(text)


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    default_out = Path(__file__).resolve().parent.parent / "data"
    parser.add_argument("--outdir", type=Path, default=default_out, help="output directory")
    args = parser.parse_args(argv)
    out: Path = args.outdir
    out.mkdir(parents=True, exist_ok=True)

    rng_cooling, rng_source = (
        np.random.default_rng(s) for s in np.random.SeedSequence(ROOT_SEED).spawn(2)
    )
    write_text(out / "cooling.csv", "\n".join(cooling_table(rng_cooling)) + "\n")
    write_text(out / "source_scan.csv", "\n".join(source_table(rng_source)) + "\n")
    write_text(out / "truth.json", json.dumps(truth(), indent=2) + "\n")
    for name in ("cooling.csv", "source_scan.csv", "truth.json"):
        print(f"wrote {out / name}")


if __name__ == "__main__":
    main()
