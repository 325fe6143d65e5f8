"""The demo's data: an INVENTED panel of orchards. No real place, farm or measurement.

Scenario (invented): 600 orchards in 30 valleys are observed over 16 seasons. The question is the
effect of irrigation (hundreds of millimetres per season) on log yield. Each orchard has a fixed,
unobserved soil quality that raises yield and also leads growers to irrigate more, so pooled OLS
overstates the effect while the within (fixed-effects) estimator recovers the true value,
:data:`TRUE_EFFECT`. Some orchards were planted late (an unbalanced panel), the fertilizer record
has a few gaps, and ``organic`` never changes within an orchard, so orchard effects absorb it.

Two further invented columns serve the other estimators (drawn from their own random stream, so
every column above, and the demo's baseline, is what it was before they existed):

* ``canal_turns``: the turns at the valley canal that the water board's rotation lottery gave the
  orchard that season. More turns let the grower irrigate more, and the lottery has nothing to do
  with the orchard's soil or weather, so it is an instrument for irrigation (its first stage is
  strong by construction);
* ``frost_damaged_trees``: a count of trees damaged by frost in the season, zero in many seasons.
  Sprinklers protect trees from frost, so irrigation lowers the expected count by
  :data:`TRUE_COUNT_EFFECT` log points per 100 mm (a Poisson model with orchard and season effects).

A third stream holds an invented staggered adoption: some growers start sowing a cover crop between
the tree rows, in different seasons (cohorts adopting in seasons 4, 7, 10 and 13; about a fifth never
adopt), and keep sowing it. ``cover_crop`` is 0/1 and ``cover_crop_season`` the season of adoption
(empty for never). The cover crop raises the soil's organic carbon (``soil_carbon``, g/kg), slowly:
the effect grows with the seasons since adoption, and more for early adopters
(:func:`cover_crop_effect`). Earlier adopters were also growers on poorer soil, and soil carbon drifts
up everywhere over the seasons, which orchard and season effects absorb. With effects that grow over
time, the two-way estimate compares later adopters with earlier ones whose effect is still growing,
and falls well short of the average effect on the treated; the heterogeneity-robust estimators recover it.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from .store import write_csv

__all__ = ["TRUE_EFFECT", "TRUE_COUNT_EFFECT", "DEMO_SEED", "DEMO_COLUMNS", "make_orchards", "write_demo_data",
           "is_current_demo", "cover_crop_effect", "ADOPTION_SEASONS"]

#: The demo file's columns, in order (a file written by an older generator lacks some and is rewritten).
DEMO_COLUMNS = ("orchard", "valley", "season", "log_yield", "irrigation", "rainfall", "frost_days", "fertilizer",
                "organic", "area_ha", "canal_turns", "frost_damaged_trees", "cover_crop", "cover_crop_season",
                "soil_carbon")

#: The invented true effect of 100 mm of irrigation on log yield.
TRUE_EFFECT = 0.08
#: The invented effect of 100 mm of irrigation on the log of the expected count of frost-damaged trees.
TRUE_COUNT_EFFECT = -0.15
DEMO_SEED = 20261201
#: The invented cover-crop cohorts' adoption seasons (and their shares of orchards; the rest never adopt).
ADOPTION_SEASONS = {4: 0.2, 7: 0.2, 10: 0.2, 13: 0.2}


def cover_crop_effect(season: np.ndarray, adoption: np.ndarray) -> np.ndarray:
    """The invented effect of the cover crop on soil carbon (g/kg): 0.3 in the season of adoption, growing
    by 0.25 a season, and by 0.1 a season more for each three seasons of earlier adoption (zero before
    adoption and for orchards that never adopt)."""
    since = np.asarray(season, dtype=float) - np.asarray(adoption, dtype=float)
    growth = 0.25 + 0.1 * (13 - np.asarray(adoption, dtype=float)) / 3
    return np.where(np.isfinite(since) & (since >= 0), 0.3 + growth * np.nan_to_num(since), 0.0)



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
    shocks = []  # the irrigation shock of each row: the lottery's part of it is drawn below
    for i in range(n):
        for t in range(first[i], n_seasons + 1):
            v = valley[i]
            rainfall = rain_vs[v, t - 1] + rng.normal(0, 0.4)
            frost = max(0, int(rng.poisson(3 + 0.3 * (v % 5))))
            shock = rng.normal(0, 0.7)
            shocks.append(shock)
            irrigation = 3.0 + 0.9 * soil[i] - 0.25 * (rainfall - 5) + shock
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
    # the other estimators' columns, from a stream of their own (see the module docstring)
    extra = np.random.default_rng([seed, 1])
    df["canal_turns"] = np.round(4.0 + 1.5 * np.asarray(shocks) + extra.normal(0, 1.0, len(df)), 2)
    exposure = extra.normal(-0.6, 0.7, n)  # a fixed frost exposure per orchard
    season_cold = extra.normal(0.0, 0.5, n_seasons)
    orchard_index = df["orchard"].str[1:].astype(int).to_numpy() - 1
    rate = np.exp(exposure[orchard_index] + season_cold[df["season"].to_numpy() - 1] + 0.08 * df["frost_days"]
                  + TRUE_COUNT_EFFECT * df["irrigation"].to_numpy())
    df["frost_damaged_trees"] = extra.poisson(rate)
    # the staggered adoption's columns, from a third stream (see the module docstring)
    third = np.random.default_rng([seed, 2])
    poorer = soil + third.normal(0, 1.0, n)  # earlier adopters farm poorer soil
    ranks = np.argsort(np.argsort(poorer)) / n
    edges = np.cumsum(list(ADOPTION_SEASONS.values()))
    cohort_of = np.searchsorted(edges, ranks, side="right")
    seasons = np.array(list(ADOPTION_SEASONS) + [np.nan])
    adoption = seasons[cohort_of]
    adopt_row = adoption[orchard_index]
    season = df["season"].to_numpy()
    df["cover_crop"] = (np.isfinite(adopt_row) & (season >= adopt_row)).astype(int)
    df["cover_crop_season"] = adopt_row
    base_carbon = 12.0 + 1.5 * soil + third.normal(0, 1.0, n)
    drift = np.cumsum(third.normal(0.15, 0.1, n_seasons))
    valley_index = df["valley"].str[1:].astype(int).to_numpy() - 1
    valley_shock = third.normal(0.0, 0.2, (n_valleys, n_seasons))
    df["soil_carbon"] = np.round(base_carbon[orchard_index] + drift[season - 1] + valley_shock[valley_index, season - 1]
                                 + cover_crop_effect(season, adopt_row) + third.normal(0, 0.5, len(df)), 4)
    return df


def is_current_demo(path: str | Path) -> bool:
    """Whether ``path`` holds a demo file with every column the generator writes."""
    path = Path(path)
    if not path.is_file():
        return False
    with open(path, encoding="utf-8") as fh:
        header = fh.readline().strip().split(",")
    return header == list(DEMO_COLUMNS)


def write_demo_data(path: str | Path, seed: int = DEMO_SEED) -> Path:
    """Write the invented orchard panel as CSV (atomically); returns the path."""
    return write_csv(path, make_orchards(seed))
