"""The cold-chain scenario: refrigerated shipments scored for the risk of a temperature excursion.

Invented for tree2sql's demo and examples; every value is generated here from a fixed seed.
A shipment "excursion" means the load left its allowed temperature band in transit.
"""

from __future__ import annotations

import numpy as np

FEATURES = [
    "transit_hours",       # hours from pick-up to delivery
    "ambient_temp_c",      # mean outside temperature along the route
    "handoffs",            # times the load changed vehicle or warehouse
    "door_openings",       # reefer door openings logged by the sensor
    "precool_minutes",     # minutes the container was pre-cooled before loading
    "packaging_code",      # 0 insulated box, 1 active container, 2 passive pallet cover
    "carrier_tier",        # 1 premium, 2 standard, 3 economy
    "battery_pct",         # sensor battery at pick-up; NULL when the sensor did not report
    "route_km",            # planned route length
]
LABELS = ("on_spec", "excursion")
SEED = 20261202


def generate(rows: int, seed: int = SEED) -> dict[str, np.ndarray]:
    """Columns of `rows` shipments, keyed by column name (shipment_id first)."""
    rng = np.random.default_rng(seed)
    route_km = np.round(rng.gamma(2.2, 260.0, rows), 1)
    transit_hours = np.round(route_km / rng.uniform(45, 75, rows) + rng.gamma(1.5, 3.0, rows), 2)
    ambient = np.round(rng.normal(17.0, 9.0, rows), 1)
    handoffs = rng.poisson(1.4, rows)
    doors = rng.poisson(2.0 + 0.8 * handoffs)
    precool = np.round(rng.uniform(0, 120, rows) * (rng.random(rows) > 0.1), 0)
    packaging = rng.choice(3, rows, p=[0.5, 0.2, 0.3])
    tier = rng.choice([1, 2, 3], rows, p=[0.25, 0.5, 0.25])
    battery = np.round(rng.uniform(5, 100, rows), 0)
    battery[rng.random(rows) < 0.07] = np.nan  # sensor gaps
    risk = (
        0.045 * transit_hours
        + 0.09 * np.clip(ambient - 18, 0, None)
        + 0.35 * handoffs
        + 0.22 * doors
        - 0.018 * precool
        - 1.1 * (packaging == 1)
        + 0.35 * (packaging == 2)
        + 0.45 * (tier - 2)
        + np.where(np.isnan(battery), 0.8, 0.012 * np.clip(30 - np.nan_to_num(battery), 0, None))
        - 3.2
        + rng.logistic(0, 0.9, rows)
    )
    return {
        "shipment_id": np.arange(1, rows + 1, dtype=np.int64),
        "transit_hours": transit_hours,
        "ambient_temp_c": ambient,
        "handoffs": handoffs.astype(np.int32),
        "door_openings": doors.astype(np.int32),
        "precool_minutes": precool,
        "packaging_code": packaging.astype(np.int32),
        "carrier_tier": tier.astype(np.int32),
        "battery_pct": battery,
        "route_km": route_km,
        "outcome": np.where(risk > 0, LABELS[1], LABELS[0]).astype(object),
    }
