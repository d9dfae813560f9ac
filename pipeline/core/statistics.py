"""Interval estimates for the published indicators: Wilson score intervals for crude
proportions, directly standardised rates with the Fay-Feuer gamma interval, and the WHO World
Standard Population weights collapsed onto the project's age bands.

Project decision 5: crude proportions get Wilson intervals, directly standardised rates get
Fay-Feuer intervals.

Everything is vectorised with numpy/scipy: inputs are array-likes, the last axis of the
standardisation inputs is the stratum (age band), any leading axes are independent groups
(district, sex). Small polars helpers at the bottom wrap the same functions for frames.

Sources
-------
* Wilson, J Am Stat Assoc 1927;22:209 (the score interval); Newcombe, Stat Med 1998;17:857
  (method 3, worked example 81/263 -> 0.2553-0.3662).
* Fay and Feuer, Stat Med 1997;16:791 (gamma interval for a directly standardised rate).
* Ahmad et al., Age standardization of rates: a new WHO standard, GPE Discussion Paper 31,
  WHO 2001 (World Standard Population 2000-2025).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import polars as pl
from scipy.stats import gamma, norm

__all__ = [
    "WHO_WORLD_STANDARD_2000_2025",
    "collapse_weights",
    "direct_standardised_rate",
    "standardise_frame",
    "wilson_interval",
    "with_wilson_interval",
]

#: WHO World Standard Population 2000-2025, per cent, by lower bound of the five-year group
#: (0-4, 5-9, ..., 95-99, 100+). Ahmad et al., WHO GPE Discussion Paper 31, 2001. The
#: published figures sum to 100.035 (rounding), so they are divided by the sum actually used.
WHO_WORLD_STANDARD_2000_2025: dict[int, float] = {
    0: 8.86, 5: 8.69, 10: 8.60, 15: 8.47, 20: 8.22, 25: 7.93, 30: 7.61, 35: 7.15, 40: 6.59,
    45: 6.04, 50: 5.37, 55: 4.55, 60: 3.72, 65: 2.96, 70: 2.21, 75: 1.52, 80: 0.91, 85: 0.44,
    90: 0.15, 95: 0.04, 100: 0.005,
}  # fmt: skip


# --------------------------------------------------------------------------- Wilson


def wilson_interval(successes, trials, confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval for a binomial proportion, element-wise.

    With p = x/n and z the standard normal quantile at 1 - alpha/2:
    centre = (p + z²/2n) / (1 + z²/n), half-width = z/(1 + z²/n) * sqrt(p(1-p)/n + z²/4n²)
    (Wilson 1927; Newcombe 1998, method 3). ``trials`` of 0 give NaN for both limits. The limits
    are exactly 0 when x = 0 and exactly 1 when x = n.

    Raises ``ValueError`` for negative counts, successes above trials, or a confidence level
    outside (0, 1).
    """
    if not 0 < confidence < 1:
        raise ValueError(f"confidence must be between 0 and 1, got {confidence}")
    x = np.asarray(successes, dtype=float)
    n = np.asarray(trials, dtype=float)
    x, n = np.broadcast_arrays(x, n)
    if np.any(x < 0) or np.any(n < 0) or np.any(x > n):
        raise ValueError("counts must satisfy 0 <= successes <= trials")
    z = norm.ppf(0.5 + confidence / 2)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = x / n
        z2n = z * z / n
        centre = (p + z2n / 2) / (1 + z2n)
        half = z / (1 + z2n) * np.sqrt(p * (1 - p) / n + z2n / (4 * n))
        low = np.clip(centre - half, 0.0, 1.0)
        high = np.clip(centre + half, 0.0, 1.0)
    low = np.where(x == 0, 0.0, low)
    high = np.where(x == n, 1.0, high)
    empty = n == 0
    return np.where(empty, np.nan, low)[()], np.where(empty, np.nan, high)[()]


# --------------------------------------------------------------------------- direct standardisation


def direct_standardised_rate(
    events_by_stratum, population_by_stratum, standard_weights, confidence: float = 0.95
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Directly standardised rate with the Fay-Feuer gamma interval (Fay and Feuer 1997).

    The stratum axis is the last one; ``standard_weights`` has one weight per stratum (any
    scale: only their proportions matter). With a_i = w_i / (n_i * sum(w)):

    * rate y = sum a_i d_i, variance estimate v = sum a_i² d_i;
    * a_M = max a_i over all strata with n_i > 0 (whether or not they had events);
    * lower = Gamma^-1(alpha/2; shape y²/v, scale v/y), and 0 when y = 0;
    * upper = Gamma^-1(1 - alpha/2; shape (y + a_M)²/(v + a_M²), scale (v + a_M²)/(y + a_M)).

    Rates are per person (multiply by 1000 for "per 1,000"). sum(w) runs over every stratum
    given, so a stratum with no population contributes a rate of 0 (give only the strata that
    exist if that is not wanted). A group with no population at all gives NaN. One group in
    (a 1-d stratum axis), numpy scalars out.

    Raises ``ValueError`` for negative inputs, events in a stratum with no population, weights
    not matching the strata, or a confidence level outside (0, 1).
    """
    if not 0 < confidence < 1:
        raise ValueError(f"confidence must be between 0 and 1, got {confidence}")
    d = np.asarray(events_by_stratum, dtype=float)
    n = np.asarray(population_by_stratum, dtype=float)
    w = np.asarray(standard_weights, dtype=float)
    d, n = np.broadcast_arrays(d, n)
    if w.ndim != 1 or d.ndim == 0 or w.shape[0] != d.shape[-1]:
        raise ValueError(f"{w.shape} weights do not match strata of shape {d.shape}")
    if np.any(d < 0) or np.any(n < 0) or np.any(w < 0) or not w.sum() > 0:
        raise ValueError("events, population and weights must be non-negative (weights not all 0)")
    if np.any((n == 0) & (d > 0)):
        raise ValueError("events in a stratum with no population")
    alpha = 1 - confidence
    with np.errstate(divide="ignore", invalid="ignore"):
        a = np.where(n > 0, w / (n * w.sum()), 0.0)
        y = (a * d).sum(axis=-1)
        v = (a * a * d).sum(axis=-1)
        a_m = a.max(axis=-1)
        lower = np.where(y > 0, gamma.ppf(alpha / 2, y * y / v, scale=v / y), 0.0)
        upper = gamma.ppf(
            1 - alpha / 2, (y + a_m) ** 2 / (v + a_m**2), scale=(v + a_m**2) / (y + a_m)
        )
    no_population = ~(n > 0).any(axis=-1)
    rate, low, high = (np.where(no_population, np.nan, x)[()] for x in (y, lower, upper))
    return rate, low, high


def collapse_weights(bands: Sequence[int], standard: dict[int, float] | None = None) -> np.ndarray:
    """Standard-population weights summed onto the project's age bands, normalised to sum 1.

    ``bands`` are the lower bounds of the project's bands (config ``summaries.age_bands``,
    e.g. [0, 5, ..., 85]); each band runs to the next lower bound and the last is open, so it
    takes every standard group from its bound up (85+ = 85-89 + 90-94 + 95-99 + 100+). The
    result is divided by the sum of the weights used, i.e. all of them (100.035 for the WHO
    standard). A bound that splits a standard group is refused: splitting needs an assumption
    about ages within the group.
    """
    standard = dict(WHO_WORLD_STANDARD_2000_2025 if standard is None else standard)
    lows = sorted(standard)
    bands = list(bands)
    if (
        not bands
        or bands[0] != lows[0]
        or any(b <= a for a, b in zip(bands, bands[1:], strict=False))
    ):
        raise ValueError(f"bands must start at {lows[0]} and increase: {bands}")
    unknown = sorted(set(bands) - set(lows))
    if unknown:
        raise ValueError(f"band bounds {unknown} split a standard age group (bounds {lows})")
    edges = [*bands, float("inf")]
    out = np.array(
        [
            sum(standard[g] for g in lows if lo <= g < hi)
            for lo, hi in zip(edges, edges[1:], strict=False)
        ]
    )
    return out / out.sum()


# --------------------------------------------------------------------------- polars helpers


def with_wilson_interval(
    frame: pl.DataFrame, successes: str, trials: str, prefix: str, confidence: float = 0.95
) -> pl.DataFrame:
    """Add ``<prefix>_low`` and ``<prefix>_high`` (Wilson) to a frame; null where trials is null or 0."""
    x = frame[successes].cast(pl.Float64).to_numpy()
    n = frame[trials].cast(pl.Float64).to_numpy()
    missing = np.isnan(x) | np.isnan(n)
    low, high = wilson_interval(np.where(missing, 0, x), np.where(missing, 0, n), confidence)
    return frame.with_columns(
        pl.Series(f"{prefix}_low", np.where(missing, np.nan, low)).fill_nan(None),
        pl.Series(f"{prefix}_high", np.where(missing, np.nan, high)).fill_nan(None),
    )


def standardise_frame(
    frame: pl.DataFrame,
    by: Sequence[str],
    stratum: str,
    events: str,
    population: str,
    weights: dict[str, float],
    confidence: float = 0.95,
    per: float = 1.0,
) -> pl.DataFrame:
    """One row per ``by`` group: ``rate``, ``rate_low``, ``rate_high`` (times ``per``).

    ``weights`` maps each stratum label (e.g. age band '85+') to its standard weight; a stratum
    missing from a group counts as population 0 and events 0. Groups come out sorted by ``by``.
    """
    labels = list(weights)
    w = np.array([weights[s] for s in labels], dtype=float)
    stray = frame.filter(~pl.col(stratum).is_in(labels))
    if stray.height:
        raise ValueError(
            f"strata without a standard weight: {sorted(set(stray[stratum].to_list()))}"
        )
    grid = (
        frame.group_by([*by, stratum])
        .agg(pl.col(events).sum().cast(pl.Float64), pl.col(population).sum().cast(pl.Float64))
        .pivot(on=stratum, index=list(by), values=[events, population])
        .sort(list(by))
    )

    def matrix(column: str) -> np.ndarray:
        names = [f"{column}_{s}" for s in labels]
        return np.column_stack([grid[c].fill_null(0).to_numpy() if c in grid.columns
                                else np.zeros(grid.height) for c in names])  # fmt: skip

    rate, low, high = direct_standardised_rate(matrix(events), matrix(population), w, confidence)
    return grid.select(list(by)).with_columns(
        pl.Series("rate", rate * per).fill_nan(None),
        pl.Series("rate_low", low * per).fill_nan(None),
        pl.Series("rate_high", high * per).fill_nan(None),
    )


def age_labels(lower_bounds: list[int]) -> list[str]:
    """Band labels from lower bounds, the last open: [0, 45, 65] -> 0-44, 45-64, 65+."""
    return [f"{lo}-{hi - 1}" for lo, hi in zip(lower_bounds, lower_bounds[1:], strict=False)] + [
        f"{lower_bounds[-1]}+"
    ]
