"""The demo's data: an INVENTED panel of orchards. No real place, farm or measurement.

Scenario (invented): 600 orchards in 30 valleys are observed over 16 seasons. The question is the
effect of irrigation (hundreds of millimetres per season) on log yield. Each orchard has a fixed,
unobserved soil quality that raises yield and also leads growers to irrigate more, so pooled OLS
overstates the effect while the within (fixed-effects) estimator recovers the true value,
:data:`TRUE_EFFECT`. Some orchards were planted late (an unbalanced panel), the fertilizer record
has a few gaps, and ``organic`` never changes within an orchard, so orchard effects absorb it.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from .store import write_csv

__all__ = ["TRUE_EFFECT", "DEMO_SEED", "make_orchards", "write_demo_data"]

#: The invented true effect of 100 mm of irrigation on log yield.
TRUE_EFFECT = 0.08
DEMO_SEED = 20261201


def make_orchards(seed: int = DEMO_SEED, n_valleys: int = 30, per_valley: int = 20,
                  n_seasons: int = 16) -> pd.DataFrame:
    """Generate the invented orchard panel.

    Examples
    --------
    >>> df = make_orchards()
    >>> df["orchard"].nunique(), df["valley"].nunique(), df["season"].nunique()
    (600, 30, 16)
    """
    rng = np.random.default_rng(seed)
    n = n_valleys * per_valley
    valley = np.repeat(np.arange(n_valleys), per_valley)
    soil = rng.normal(0.0, 1.0, n)  # unobserved and fixed: the confounder
    organic = (soil + rng.normal(0, 1.0, n) > 0.8).astype(int)
    area = np.round(rng.lognormal(1.5, 0.5, n), 2)
    first = np.where(rng.random(n) < 0.12, rng.integers(2, 7, n), 1)  # late plantings
    slope = rng.normal(0.0, 0.01, n)
    valley_season = rng.normal(0.0, 0.15, (n_valleys, n_seasons))
    rain_vs = rng.normal(5.0, 1.2, (n_valleys, n_seasons))
    rows = []
    for i in range(n):
        for t in range(first[i], n_seasons + 1):
            v = valley[i]
            rainfall = rain_vs[v, t - 1] + rng.normal(0, 0.4)
            frost = max(0, int(rng.poisson(3 + 0.3 * (v % 5))))
            irrigation = 3.0 + 0.9 * soil[i] - 0.25 * (rainfall - 5) + rng.normal(0, 0.7)
            fertilizer = 1.0 + 0.2 * soil[i] + rng.normal(0, 0.3)
            log_yield = (
                1.5 + TRUE_EFFECT * irrigation + 0.45 * soil[i] + 0.03 * rainfall - 0.04 * frost
                + 0.05 * fertilizer + 0.10 * organic[i] + slope[i] * t
                + valley_season[v, t - 1] + rng.normal(0, 0.2)
            )
            rows.append((f"O{i + 1:03d}", f"V{v + 1:02d}", t, round(log_yield, 6), round(irrigation, 6),
                         round(rainfall, 4), frost, round(fertilizer, 4), organic[i], area[i]))
    df = pd.DataFrame(rows, columns=["orchard", "valley", "season", "log_yield", "irrigation",
                                     "rainfall", "frost_days", "fertilizer", "organic", "area_ha"])
    gaps = rng.choice(len(df), size=len(df) // 50, replace=False)
    df.loc[gaps, "fertilizer"] = np.nan
    return df


def write_demo_data(path: str | Path, seed: int = DEMO_SEED) -> Path:
    """Write the invented orchard panel as CSV (atomically); returns the path."""
    return write_csv(path, make_orchards(seed))
