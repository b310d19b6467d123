"""Sample a fleet of devices from its device types and regions, as a struct of arrays.

Random streams: the fleet is drawn from its own named ``numpy.random.Generator`` derived from
the run seed (:func:`stream`), once for the whole fleet in device order, so the fleet a seed
gives does not depend on the round settings, the policy or the horizon (common random
numbers across a study's cells). What devices do later is drawn keyed per device and
check-in tick (:mod:`fleetsim.keyed`, listed in :mod:`fleetsim.engine`).
"""

from __future__ import annotations

import zlib
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .config import Config, Trait

__all__ = ["Fleet", "sample_fleet", "stream"]


def stream(seed: int, name: str) -> np.random.Generator:
    """The run's random stream called ``name``: independent of every other name."""
    return np.random.default_rng(np.random.SeedSequence(entropy=seed, spawn_key=(zlib.crc32(name.encode()),)))


@dataclass(frozen=True)
class Fleet:
    """Every device's static traits; index ``i`` is device ``i`` in every array.

    Units are in the names: seconds (``_s``), bytes, watts (``_w``), watt-hours (``_wh``),
    Mbit/s (``_mbps``). The fleet file gives bit rates in bit/s (``download_rate``,
    ``upload_rate``): :func:`sample_fleet` converts them.
    """

    type_names: tuple[str, ...]
    region_names: tuple[str, ...]
    device_type: np.ndarray  # int16 index into type_names
    region: np.ndarray  # int16 index into region_names
    sample_cost_s: np.ndarray
    memory_bytes: np.ndarray
    battery_wh: np.ndarray
    train_power_w: np.ndarray
    radio_power_w: np.ndarray
    charge_power_w: np.ndarray
    down_mbps: np.ndarray
    up_mbps: np.ndarray
    samples: np.ndarray  # int32, at least 1
    checkin_phase_s: np.ndarray  # offset of the device's check-in ticks in [0, checkin_every)

    @property
    def size(self) -> int:
        return int(self.device_type.size)

    @property
    def group(self) -> np.ndarray:
        """Index of each device's (device type, region) pair: type * regions + region."""
        return self.device_type.astype(np.int32) * len(self.region_names) + self.region

    def frame(self) -> pd.DataFrame:
        """The fleet as a DataFrame, one row per device (categorical type and region)."""
        return pd.DataFrame(
            {
                "device_type": pd.Categorical.from_codes(self.device_type, self.type_names),
                "region": pd.Categorical.from_codes(self.region, self.region_names),
                "sample_cost_s": self.sample_cost_s,
                "memory_bytes": self.memory_bytes,
                "battery_wh": self.battery_wh,
                "train_power_w": self.train_power_w,
                "down_mbps": self.down_mbps,
                "up_mbps": self.up_mbps,
                "samples": self.samples,
            }
        )


# Fleet arrays hold bit rates in Mbit/s; the fleet file in bit/s.
_BIT_PER_S_PER_MBPS = 1e6


def _draw(rng: np.random.Generator, trait: Trait, size: int, per_unit: float = 1.0) -> np.ndarray:
    """``size`` lognormal draws of ``trait``, in units of ``per_unit`` of the trait's unit.

    The median is divided before drawing (exact for whole numbers of Mbit/s), so a draw is
    the same float it was when the file gave the median in the array's unit.
    """
    median = trait.median / per_unit
    if trait.spread == 0:
        return np.full(size, median)
    return median * np.exp(trait.spread * rng.standard_normal(size))


def sample_fleet(config: Config, seed: int, pairs: np.ndarray | None = None) -> Fleet:
    """Draw ``config.fleet.devices`` devices: each its (type, region) pair from the fleet's joint
    mix (:meth:`fleetsim.config.FleetSpec.joint_mix`), its traits lognormal from the pair's
    spec (:meth:`fleetsim.config.FleetSpec.group_spec`). ``pairs`` (type index x regions +
    region index, one per device) gives the devices' pairs instead, as for logged devices."""
    spec = config.fleet
    rng = stream(seed, "fleet")
    type_names = tuple(spec.device_types)
    region_names = tuple(spec.regions)
    joint = np.array(spec.joint_mix()).reshape(-1)  # [type * regions + region]
    if pairs is None:
        n = spec.devices
        pair = rng.choice(joint.size, size=n, p=joint / joint.sum())
    else:
        pair = np.asarray(pairs, dtype=np.int64)
        n = pair.size
    device_type = (pair // len(region_names)).astype(np.int16)
    region = (pair % len(region_names)).astype(np.int16)

    columns: dict[str, np.ndarray] = {
        key: np.empty(n)
        for key in ("sample_cost_s", "memory_bytes", "battery_wh", "train_power_w", "radio_power_w",
                    "charge_power_w", "down_mbps", "up_mbps", "samples")
    }
    by_pair = np.argsort(pair, kind="stable")
    bounds = np.concatenate([[0], np.cumsum(np.bincount(pair, minlength=joint.size))])
    for index, tname in enumerate(type_names):
        for r, rname in enumerate(region_names):
            kind = spec.group_spec(tname, rname)
            g = index * len(region_names) + r
            members = by_pair[bounds[g]:bounds[g + 1]]  # in device order
            count = members.size
            traits = {  # array -> (trait, its unit per array unit)
                "sample_cost_s": (kind.sample_cost, 1.0),
                "memory_bytes": (kind.memory, 1.0),
                "battery_wh": (kind.battery_capacity, 1.0),
                "train_power_w": (kind.train_power, 1.0),
                "down_mbps": (kind.download_rate, _BIT_PER_S_PER_MBPS),
                "up_mbps": (kind.upload_rate, _BIT_PER_S_PER_MBPS),
                "samples": (kind.samples, 1.0),
            }
            # Draw in a fixed order so each trait's stream position depends only on the fleet spec.
            for key, (trait, per_unit) in traits.items():
                columns[key][members] = _draw(rng, trait, count, per_unit)
            columns["radio_power_w"][members] = kind.radio_power
            columns["charge_power_w"][members] = kind.charge_power
    phase = rng.uniform(0.0, config.rounds.checkin_every, size=n)
    return Fleet(
        type_names=type_names,
        region_names=region_names,
        device_type=device_type,
        region=region,
        sample_cost_s=columns["sample_cost_s"],
        memory_bytes=columns["memory_bytes"],
        battery_wh=columns["battery_wh"],
        train_power_w=columns["train_power_w"],
        radio_power_w=columns["radio_power_w"],
        charge_power_w=columns["charge_power_w"],
        down_mbps=columns["down_mbps"],
        up_mbps=columns["up_mbps"],
        samples=np.maximum(1, np.rint(columns["samples"])).astype(np.int32),
        checkin_phase_s=phase,
    )
