"""Seeded generators for Grovekeeper's two invented demo scenarios.

Both tables are synthetic (no real people, places or brands). Their targets depend on the
features through non-linear effects and interactions, so a tuned gradient-boosted model
should clearly beat a linear baseline on them.

Usage: ``python -m examples.demo_data OUTDIR`` writes ``kilns.csv`` and ``greenhouse.csv``.
"""

from __future__ import annotations

import argparse
import pathlib
import sys
from collections.abc import Sequence

import numpy as np
import pandas as pd

__all__ = ["kilns", "greenhouse", "write_demo_tables", "main"]

# --- kilns -------------------------------------------------------------------------------

KILNS: tuple[str, ...] = ("north", "south", "east", "annex")
KILN_SHARE = np.array([0.32, 0.28, 0.25, 0.15])
# The annex kiln is the oldest and fires less evenly.
KILN_LOGIT = np.array([0.0, -0.15, 0.1, 0.45])

# Ideal peak temperature (degrees C) per clay body; the defect risk is U-shaped around it.
CLAY_IDEAL_C: dict[str, float] = {
    "terracotta": 1185.0,
    "earthenware": 1195.0,
    "raku": 1205.0,
    "ball_clay_mix": 1235.0,
    "stoneware": 1260.0,
    "porcelain": 1285.0,
}
CLAY_BODIES: tuple[str, ...] = tuple(CLAY_IDEAL_C)
CLAY_SHARE = np.array([0.12, 0.18, 0.08, 0.12, 0.32, 0.18])

SHELVES: tuple[str, ...] = ("top", "middle", "bottom")

# Intercept chosen so that the default table has roughly a quarter of firings defective.
KILN_INTERCEPT = -5.35

# Share of readings blanked out per column (sensor dropouts), applied as exact counts.
KILN_MISSING: dict[str, float] = {
    "humidity_pct": 0.03,
    "glaze_thickness_mm": 0.03,
    "cooling_rate_c_per_h": 0.01,
}

KILN_COLUMNS: tuple[str, ...] = (
    "firing_id",
    "kiln",
    "clay_body",
    "peak_temp_c",
    "ramp_rate_c_per_h",
    "hold_minutes",
    "cooling_rate_c_per_h",
    "humidity_pct",
    "glaze_thickness_mm",
    "load_fraction",
    "shelf_position",
    "fired_on",
    "defect",
)

# --- greenhouse --------------------------------------------------------------------------

BAYS: tuple[str, ...] = ("A1", "A2", "B1", "B2", "C1", "C2")
# Small per-bay multipliers: older glazing, different orientation.
BAY_FACTOR = np.array([1.04, 1.00, 0.97, 1.02, 0.94, 1.05])

CROPS: tuple[str, ...] = ("tomato", "cucumber", "pepper", "lettuce", "strawberry")
# Per crop: weekly yield ceiling (kg/m2), optimal day temperature (C), optimal nutrient
# conductivity (mS/cm) and optimal irrigation (L/m2/day).
CROP_BASE_KG = np.array([1.6, 2.0, 1.1, 0.7, 0.55])
CROP_OPT_TEMP_C = np.array([23.0, 25.5, 24.0, 17.0, 20.0])
CROP_OPT_EC = np.array([3.0, 2.3, 2.5, 1.3, 1.6])
CROP_OPT_IRRIGATION = np.array([5.5, 6.0, 4.5, 3.0, 3.5])

GREENHOUSE_MISSING: dict[str, float] = {
    "co2_ppm": 0.02,
    "ec_ms_per_cm": 0.01,
}

GREENHOUSE_COLUMNS: tuple[str, ...] = (
    "bay",
    "crop",
    "day_temp_c",
    "night_temp_c",
    "co2_ppm",
    "light_mol_per_m2_day",
    "irrigation_l_per_m2",
    "ec_ms_per_cm",
    "week_of_year",
    "planted_on",
    "yield_kg_per_m2",
)

_YEAR_START = np.datetime64("2024-01-01", "D")


def _sigmoid(x: np.ndarray) -> np.ndarray:
    """Logistic function."""
    return np.asarray(1.0 / (1.0 + np.exp(-x)))


def _blank_out(rng: np.random.Generator, values: np.ndarray, fraction: float) -> np.ndarray:
    """Return a float copy of ``values`` with exactly ``round(fraction * n)`` entries NaN."""
    out = values.astype(np.float64, copy=True)
    count = round(fraction * len(out))
    # Exact counts (not a Bernoulli draw per row) keep the missing share predictable.
    out[rng.choice(len(out), size=count, replace=False)] = np.nan
    return out


def _iso_dates(days: np.ndarray) -> np.ndarray:
    """ISO ``YYYY-MM-DD`` strings for day offsets from the start of 2024."""
    return np.datetime_as_string(_YEAR_START + days.astype("timedelta64[D]"), unit="D")


def _str_column(values: np.ndarray) -> pd.Series:
    """A pandas ``str``-dtype column (explicit so the dtype never depends on inference)."""
    return pd.Series(values, dtype="str")


def kilns(n_rows: int = 2000, seed: int = 7) -> pd.DataFrame:
    """Kiln firings from an invented ceramics workshop; binary target ``defect``.

    Defect risk is U-shaped in peak temperature around the clay body's ideal, rises with a
    fast ramp and a short hold, jumps above a humidity threshold, and has a crazing
    interaction between fast cooling and thick glaze. Roughly 20-30% of firings are defects.
    """
    if n_rows < 1:
        raise ValueError("n_rows must be positive")
    rng = np.random.default_rng(seed)

    # Random, gapped ids: the column looks like an identifier and carries no signal.
    id_numbers = rng.choice(10 * n_rows, size=n_rows, replace=False) + 1
    firing_id = np.array([f"F-{k:06d}" for k in id_numbers])

    kiln_idx = rng.choice(len(KILNS), size=n_rows, p=KILN_SHARE)
    clay_idx = rng.choice(len(CLAY_BODIES), size=n_rows, p=CLAY_SHARE)
    shelf_idx = rng.integers(0, len(SHELVES), size=n_rows)
    ideal = np.array(list(CLAY_IDEAL_C.values()))[clay_idx]

    # Potters aim near the clay's ideal but miss by a few tens of degrees.
    peak_temp = np.clip(ideal + rng.normal(0.0, 26.0, n_rows), 1150.0, 1330.0)
    ramp_rate = rng.uniform(60.0, 260.0, n_rows)
    hold_minutes = rng.integers(0, 61, size=n_rows)
    cooling_rate = rng.uniform(40.0, 300.0, n_rows)
    glaze = np.clip(rng.gamma(6.0, 1.0 / 6.0, n_rows) * 1.05, 0.2, 2.6)
    load_fraction = rng.uniform(0.3, 1.0, n_rows)

    day_of_year = rng.integers(0, 366, size=n_rows)
    # Workshop humidity follows the seasons (damp late summer) plus day-to-day weather.
    season = np.sin(2.0 * np.pi * (day_of_year - 120) / 366.0)
    humidity = np.clip(55.0 + 14.0 * season + rng.normal(0.0, 9.0, n_rows), 20.0, 98.0)

    temp_dev = (peak_temp - ideal) / 20.0
    logit = (
        KILN_INTERCEPT
        + 1.3 * temp_dev**2  # under-fired (porous) or over-fired (slumped, bloated)
        + 1.6 * _sigmoid((ramp_rate - 205.0) / 12.0)  # fast ramps crack greenware
        + 1.2 * np.exp(-hold_minutes / 8.0)  # too short a soak leaves glaze unmatured
        + 3.5 * _sigmoid((cooling_rate - 175.0) / 15.0) * _sigmoid((glaze - 1.25) / 0.1)
        + 2.0 * (humidity > 68.0)  # damp ware and glaze blister above a threshold
        + 0.7 * (load_fraction - 0.3) * (shelf_idx == 0)  # full kilns run hot at the top
        + KILN_LOGIT[kiln_idx]
        + rng.normal(0.0, 0.3, n_rows)  # unrecorded causes
    )
    defect = (rng.random(n_rows) < _sigmoid(logit)).astype(np.int64)

    # Readings go missing after the outcome is decided: the sensor drops, the firing doesn't.
    cooling_rate = _blank_out(rng, cooling_rate, KILN_MISSING["cooling_rate_c_per_h"])
    humidity = _blank_out(rng, humidity, KILN_MISSING["humidity_pct"])
    glaze = _blank_out(rng, glaze, KILN_MISSING["glaze_thickness_mm"])

    frame = pd.DataFrame(
        {
            "firing_id": _str_column(firing_id),
            "kiln": _str_column(np.array(KILNS)[kiln_idx]),
            "clay_body": _str_column(np.array(CLAY_BODIES)[clay_idx]),
            "peak_temp_c": np.round(peak_temp, 1),
            "ramp_rate_c_per_h": np.round(ramp_rate, 1),
            "hold_minutes": hold_minutes.astype(np.int64),
            "cooling_rate_c_per_h": np.round(cooling_rate, 1),
            "humidity_pct": np.round(humidity, 1),
            "glaze_thickness_mm": np.round(glaze, 2),
            "load_fraction": np.round(load_fraction, 3),
            "shelf_position": _str_column(np.array(SHELVES)[shelf_idx]),
            "fired_on": _str_column(_iso_dates(day_of_year)),
            "defect": defect,
        }
    )
    return frame


def greenhouse(n_rows: int = 1500, seed: int = 11) -> pd.DataFrame:
    """Weekly harvests from an invented greenhouse; regression target ``yield_kg_per_m2``.

    Yield has a per-crop temperature optimum, a saturating light response, a CO2 benefit
    with diminishing returns that only pays off under good light, per-crop nutrient and
    irrigation optima, and right-skewed multiplicative noise. Always positive.
    """
    if n_rows < 1:
        raise ValueError("n_rows must be positive")
    rng = np.random.default_rng(seed)

    bay_idx = rng.integers(0, len(BAYS), size=n_rows)
    crop_idx = rng.integers(0, len(CROPS), size=n_rows)

    week = rng.integers(1, 53, size=n_rows)
    crop_age_weeks = rng.integers(3, 41, size=n_rows)
    # Harvest week start minus crop age gives the planting date (may fall in 2023).
    planted_days = (week - 1) * 7 - crop_age_weeks * 7 + rng.integers(0, 7, size=n_rows)

    # Growers set temperatures near the crop's optimum, with plenty of drift.
    opt_temp = CROP_OPT_TEMP_C[crop_idx]
    day_temp = opt_temp + rng.normal(0.0, 3.5, n_rows)
    night_temp = day_temp - rng.uniform(2.0, 10.0, n_rows)

    # Natural light follows the season; some bays add supplementary lighting.
    season = np.sin(2.0 * np.pi * (week - 12) / 52.0)
    light = np.clip(
        15.0 + 10.0 * season + rng.uniform(0.0, 8.0, n_rows) + rng.normal(0.0, 2.5, n_rows),
        2.0,
        45.0,
    )
    co2 = rng.uniform(380.0, 1300.0, n_rows)
    irrigation = rng.uniform(1.5, 9.0, n_rows)
    ec = rng.uniform(0.8, 4.5, n_rows)

    temp_factor = 0.15 + 0.85 * np.exp(-(((day_temp - opt_temp) / 4.0) ** 2))
    dif = day_temp - night_temp
    night_factor = 0.85 + 0.15 * np.exp(-(((dif - 6.0) / 3.0) ** 2))  # mild day/night effect
    light_factor = 1.0 - np.exp(-light / 12.0)  # photosynthesis saturates
    # Extra CO2 helps with diminishing (log) returns, and only as far as light allows.
    co2_factor = 1.0 + 0.6 * np.log(co2 / 380.0) * light_factor
    irrigation_factor = np.exp(-(((irrigation - CROP_OPT_IRRIGATION[crop_idx]) / 3.0) ** 2))
    ec_factor = 0.55 + 0.45 * np.exp(-(((ec - CROP_OPT_EC[crop_idx]) / 1.0) ** 2))
    noise = rng.lognormal(0.0, 0.12, n_rows)  # right-skewed: occasional bumper picks

    yield_kg = (
        CROP_BASE_KG[crop_idx]
        * BAY_FACTOR[bay_idx]
        * temp_factor
        * night_factor
        * light_factor
        * co2_factor
        * (0.35 + 0.65 * irrigation_factor)
        * ec_factor
        * noise
    )
    # Keep the target strictly positive even after rounding.
    yield_kg = np.maximum(np.round(yield_kg, 3), 0.001)

    co2 = _blank_out(rng, np.round(co2), GREENHOUSE_MISSING["co2_ppm"])
    ec = _blank_out(rng, ec, GREENHOUSE_MISSING["ec_ms_per_cm"])

    frame = pd.DataFrame(
        {
            "bay": _str_column(np.array(BAYS)[bay_idx]),
            "crop": _str_column(np.array(CROPS)[crop_idx]),
            "day_temp_c": np.round(day_temp, 1),
            "night_temp_c": np.round(night_temp, 1),
            "co2_ppm": co2,
            "light_mol_per_m2_day": np.round(light, 2),
            "irrigation_l_per_m2": np.round(irrigation, 2),
            "ec_ms_per_cm": np.round(ec, 2),
            "week_of_year": week.astype(np.int64),
            "planted_on": _str_column(_iso_dates(planted_days)),
            "yield_kg_per_m2": yield_kg,
        }
    )
    return frame


def write_demo_tables(folder: str | pathlib.Path) -> dict[str, pathlib.Path]:
    """Write ``kilns.csv`` and ``greenhouse.csv`` (default sizes and seeds) into ``folder``."""
    out_dir = pathlib.Path(folder)
    out_dir.mkdir(parents=True, exist_ok=True)
    paths: dict[str, pathlib.Path] = {}
    for name, frame in (("kilns", kilns()), ("greenhouse", greenhouse())):
        path = out_dir / f"{name}.csv"
        frame.to_csv(path, index=False)
        paths[name] = path
    return paths


def main(argv: Sequence[str] | None = None) -> int:
    """CLI entry: write the demo tables into OUTDIR and print their paths."""
    parser = argparse.ArgumentParser(
        prog="python -m examples.demo_data", description="Write Grovekeeper's demo tables."
    )
    parser.add_argument("outdir", type=pathlib.Path, help="folder to write the CSV files into")
    args = parser.parse_args(argv)
    for path in write_demo_tables(args.outdir).values():
        print(path)
    return 0


if __name__ == "__main__":
    sys.exit(main())
