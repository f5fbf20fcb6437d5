"""State features of a decision step, shared by the pipeline and the simulator.

A state is five small integers, packed into one ``state_key`` so that policy
tables are plain arrays and analysts can join a decoded lookup table in SQL.
The simulator draws its residents' choices from the same features, so the
behaviour it logs is a policy over exactly what the pipeline can observe.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl

FIELDS = ("hour_bucket", "degree_bin", "price_tier", "offset", "steps_left")


@dataclass(frozen=True)
class StateSpace:
    """How raw step features are binned into a state key."""

    hour_bucket_hours: int = 3
    """Width of a local-hour bucket, hours (24 must divide by it)."""
    degree_base_c: float = 18.3
    """Balance-point temperature for degree-hours, °C (65 °F, common practice)."""
    degree_bin_edges_c: tuple[float, ...] = (4.0, 8.0, 12.0)
    """Upper edges of the degree-hour bins, °C above (cooling) or below (heating) the base."""
    price_tiers: int = 3
    """Number of price tiers kept; higher tiers are merged into the top one."""
    offset_min: int = -1
    """Lowest setback offset kept in the state, °C (negative: past comfort)."""
    offset_max: int = 4
    """Highest setback offset kept in the state, °C."""
    steps_left_cap: int = 4
    """Steps remaining are counted 1, 2, ... up to this cap, which means 'this many or more'."""

    @property
    def sizes(self) -> tuple[int, ...]:
        """Cardinality of each field, in the order of ``FIELDS``."""
        return (
            24 // self.hour_bucket_hours,
            len(self.degree_bin_edges_c) + 1,
            self.price_tiers,
            self.offset_max - self.offset_min + 1,
            self.steps_left_cap,
        )

    @property
    def n_states(self) -> int:
        """Number of distinct state keys."""
        return int(np.prod(self.sizes))

    def degrees(self, outdoor_c: np.ndarray, heating: np.ndarray | bool = False) -> np.ndarray:
        """Degrees past the balance point, °C: cooling above it, heating below it, never negative."""
        outdoor_c = np.asarray(outdoor_c, dtype=float)
        signed = np.where(heating, self.degree_base_c - outdoor_c, outdoor_c - self.degree_base_c)
        return np.maximum(signed, 0.0)

    def fields(
        self,
        local_hour: np.ndarray,
        degrees_c: np.ndarray,
        price_tier: np.ndarray,
        offset_c: np.ndarray,
        steps_left: np.ndarray,
    ) -> dict[str, np.ndarray]:
        """Bin raw features into the integer fields of the state (arrays of equal length)."""
        return {
            "hour_bucket": np.asarray(local_hour, dtype=np.int64) // self.hour_bucket_hours,
            "degree_bin": np.searchsorted(
                np.asarray(self.degree_bin_edges_c), np.asarray(degrees_c, dtype=float), side="right"
            ).astype(np.int64),
            "price_tier": np.clip(np.asarray(price_tier, dtype=np.int64), 0, self.price_tiers - 1),
            "offset": np.clip(
                np.rint(np.asarray(offset_c, dtype=float)).astype(np.int64),
                self.offset_min,
                self.offset_max,
            ),
            "steps_left": np.clip(np.asarray(steps_left, dtype=np.int64), 1, self.steps_left_cap),
        }

    def encode_fields(self, f: dict[str, np.ndarray]) -> np.ndarray:
        """Pack integer fields into state keys (mixed-radix, row-major over ``FIELDS``)."""
        shifted = (
            f["hour_bucket"],
            f["degree_bin"],
            f["price_tier"],
            np.asarray(f["offset"]) - self.offset_min,
            np.asarray(f["steps_left"]) - 1,
        )
        return np.ravel_multi_index(tuple(np.asarray(x, dtype=np.int64) for x in shifted), self.sizes)

    def encode(self, local_hour, degrees_c, price_tier, offset_c, steps_left) -> np.ndarray:
        """State keys from raw features; see ``fields`` for the binning."""
        return self.encode_fields(self.fields(local_hour, degrees_c, price_tier, offset_c, steps_left))

    def decode(self, keys: np.ndarray) -> dict[str, np.ndarray]:
        """Integer fields of the given state keys (offset in °C, steps_left from 1)."""
        parts = np.unravel_index(np.asarray(keys, dtype=np.int64), self.sizes)
        out = dict(zip(FIELDS, (np.asarray(p, dtype=np.int64) for p in parts), strict=True))
        out["offset"] = out["offset"] + self.offset_min
        out["steps_left"] = out["steps_left"] + 1
        return out

    def lookup(self) -> pl.DataFrame:
        """One row per state key with its decoded fields and readable ranges, for SQL joins."""
        keys = np.arange(self.n_states, dtype=np.int64)
        f = self.decode(keys)
        lower = np.asarray((0.0, *self.degree_bin_edges_c))
        upper = np.asarray((*self.degree_bin_edges_c, np.inf))
        return pl.DataFrame(
            {
                "state_key": keys,
                **f,
                "hour_from": f["hour_bucket"] * self.hour_bucket_hours,
                "hour_to": (f["hour_bucket"] + 1) * self.hour_bucket_hours,
                "degrees_from_c": lower[f["degree_bin"]],
                "degrees_to_c": upper[f["degree_bin"]],
            }
        )
