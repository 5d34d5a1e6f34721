"""The demo scenario: invented cold-storage pallet checks.

A refrigerated warehouse scans every incoming pallet of chilled goods and
decides whether to ``release`` it to stock, ``inspect`` it by hand, or
``hold`` it. Six readings describe a pallet; the ground truth comes from a
made-up risk rule with interactions and noise, so a kernel model is useful
and not every label is predictable. Everything here is invented for rbfgate;
the generator is seeded, so the same seed always gives the same file.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np

__all__ = ["CLASSES", "FEATURE_INFO", "FEATURES", "TARGET", "generate", "write_demo_files"]

TARGET = "decision"
CLASSES = ("release", "inspect", "hold")
FEATURE_INFO: dict[str, dict] = {
    "core_temp_c": {"unit": "degC", "description": "product core temperature at the dock probe", "bounds": [-40, 60]},
    "surface_temp_c": {"unit": "degC", "description": "pallet surface temperature from the infrared gate",
                       "bounds": [-40, 60]},
    "humidity_pct": {"unit": "%RH", "description": "relative humidity logged in the trailer", "bounds": [0, 100]},
    "transit_hours": {"unit": "h", "description": "hours from loading to arrival", "bounds": [0, 1000]},
    "door_open_min": {"unit": "min", "description": "minutes the trailer door stood open in transit", "bounds": [0, 1000]},
    "peak_shock_g": {"unit": "g", "description": "largest acceleration recorded by the pallet tag", "bounds": [0, 100]},
}
FEATURES = tuple(FEATURE_INFO)


def generate(rows: int, seed: int) -> tuple[np.ndarray, list[str]]:
    """Return ``rows`` pallets as (rows, 6) raw readings in FEATURES order, and their labels."""
    rng = np.random.default_rng(seed)
    transit = rng.gamma(shape=4.0, scale=3.0, size=rows)
    door = rng.exponential(scale=6.0, size=rows)
    core = 2.5 + 0.05 * transit + 0.12 * door + rng.normal(0.0, 0.9, rows)
    surface = core + 0.8 + 0.08 * door + rng.normal(0.0, 0.6, rows)
    humidity = np.clip(rng.normal(82.0, 7.0, rows) + 0.4 * door, 40.0, 100.0)
    shock = rng.lognormal(mean=0.3, sigma=0.45, size=rows)
    # Warm cores are risky, more so after long trips; condensation (humid + warm
    # surface) and hard knocks add risk on their own.
    warmth = np.maximum(core - 4.0, 0.0)
    risk = (
        1.4 * warmth**2 * (1.0 + transit / 24.0)
        + 0.9 * np.maximum(surface - core - 1.5, 0.0) * (humidity > 88.0)
        + 0.8 * np.maximum(shock - 2.2, 0.0) ** 2
        + 0.04 * door
        + rng.normal(0.0, 0.35, rows)
    )
    labels = np.where(risk < 0.9, CLASSES[0], np.where(risk < 2.6, CLASSES[1], CLASSES[2]))
    values = np.column_stack([core, surface, humidity, transit, door, shock]).round(2)
    return values, labels.tolist()


def write_demo_files(folder: Path, *, rows: int = 1200, seed: int = 7) -> dict[str, Path]:
    """Write the training CSV, the feature-info JSON and a CSV of incoming pallets to score.

    The incoming file mixes ordinary pallets with a few that a careful service
    must refuse: a missing reading, text in a numeric column, readings far
    outside anything seen in training, and a pallet whose every reading is in
    range but whose combination is unlike any training pallet (the two
    temperatures swapped: a surface colder than the core).
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    values, labels = generate(rows, seed)
    training = folder / "pallet_checks.csv"
    with open(training, "w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow([*FEATURES, TARGET])
        for row, label in zip(values.tolist(), labels):
            writer.writerow([*row, label])
    info = folder / "pallet_features.json"
    info.write_text(json.dumps(FEATURE_INFO, indent=2) + "\n", encoding="utf-8")
    incoming_values, _ = generate(12, seed + 1)
    incoming = folder / "incoming_pallets.csv"
    with open(incoming, "w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["pallet_id", *FEATURES])
        for number, row in enumerate(incoming_values.tolist(), start=1):
            writer.writerow([f"P-{number:04d}", *row])
        writer.writerow(["P-0013", 3.1, 3.9, 80.0, 10.5, "", 1.2])  # door reading lost
        writer.writerow(["P-0014", 2.8, "warm", 84.0, 8.0, 3.0, 1.1])  # free text in a number column
        writer.writerow(["P-0015", 19.0, 21.5, 84.0, 9.0, 4.0, 1.0])  # core far warmer than any training pallet
        writer.writerow(["P-0016", 7.0, 2.0, 84.0, 9.0, 3.0, 1.0])  # temperatures swapped: outside the domain
    return {"training": training, "feature_info": info, "incoming": incoming}
