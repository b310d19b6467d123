"""Round-protocol blocks of a fleet file: how an update is encoded, and secure aggregation.

Both hold their own arithmetic (docs/fleet-file.md, "Update encoding" and "Secure
aggregation"), so that the engine, the memory estimate and the report read one formula.
"""

from __future__ import annotations

import math

from pydantic import Field

from .fields import Count, Duration, PositiveDuration, Real, Size, _Strict

__all__ = ["UpdateEncoding", "SecureAggregation", "Pacing", "WEIGHT_BYTES"]

WEIGHT_BYTES = 4
"""Bytes per model weight as downloaded: the model is held as 32-bit floats."""


class UpdateEncoding(_Strict):
    """How a device encodes its update before the upload: quantisation to ``bits_per_weight``
    (optionally after a random rotation), keeping ``keep_fraction`` of the weights."""

    bits_per_weight: Count = Field(default=32, ge=1, le=32)
    rotation: bool = False
    keep_fraction: Real = Field(default=1.0, gt=0.0, le=1.0, description="share of weights sent")
    encode_time: Duration = Field(default=0.0, ge=0, description="on-device time per million weights")
    rotation_time: Duration = Field(default=0.0, ge=0, description="extra time per million weights, rotation on")

    def weights(self, model_size: float) -> float:
        """Weights in a model of ``model_size`` bytes."""
        return model_size / WEIGHT_BYTES

    def upload_bytes(self, model_size: float) -> float:
        """Bytes of an encoded update: the kept weights at ``bits_per_weight``, plus, when
        sparsified, their positions (a 32-bit index per kept weight or a one-bit-per-weight
        mask, whichever is smaller)."""
        n = self.weights(model_size)
        kept = n * self.keep_fraction
        index = 0.0 if self.keep_fraction == 1.0 else min(kept * 4.0, n / 8.0)
        return kept * self.bits_per_weight / 8.0 + index

    def encode_s(self, model_size: float) -> float:
        """On-device encoding time, s (before any compute-drift factor)."""
        per_million = self.encode_time + (self.rotation_time if self.rotation else 0.0)
        return self.weights(model_size) / 1e6 * per_million


class SecureAggregation(_Strict):
    """Secure aggregation's extra phases (key advertisement, key sharing, masked upload,
    unmasking) and its threshold: the server unmasks the sum only if at least
    ``ceil(threshold * n)`` of the round's n accepted devices answer the unmasking."""

    threshold: Real = Field(default=0.67, gt=0.0, le=1.0)
    key_advertisement: Duration = Field(default=10.0, ge=0)
    key_sharing: Duration = Field(default=20.0, ge=0)
    unmasking: Duration = Field(default=15.0, ge=0)
    key_bytes: Size = Field(default=32.0, ge=0, description="one public key")
    share_bytes: Size = Field(default=64.0, ge=0, description="one encrypted secret share")

    def needed(self, accepted: int) -> int:
        """Unmasking answers the server needs from a round that accepted ``accepted`` devices."""
        return math.ceil(self.threshold * accepted - 1e-9)

    def phase_bytes(self, accepted: int) -> dict[str, tuple[float, float]]:
        """Bytes (down, up) each device moves in each extra phase of a round of ``accepted``
        devices: every device's two public keys come down in the advertisement, one share per
        peer goes each way in the key sharing, one share per peer goes up in the unmasking."""
        peers = max(accepted - 1, 0)
        return {
            "key-advertisement": (2.0 * self.key_bytes * accepted, 2.0 * self.key_bytes),
            "key-sharing": (peers * self.share_bytes, peers * self.share_bytes),
            "unmasking": (0.0, peers * self.share_bytes),
        }

    @staticmethod
    def masked_bits(bits_per_weight: int, accepted: int) -> int:
        """Bits per weight of a masked update: the sum of ``accepted`` values must not wrap, so
        the masked field is ``ceil(log2(accepted))`` bits wider than the encoding."""
        return bits_per_weight + math.ceil(math.log2(max(accepted, 1)) - 1e-12)


class Pacing(_Strict):
    """The server paces check-ins: it tells a device it does not need to stay away for a number
    of check-in periods (the stretch), set so that it meets check-ins at the rate rounds
    need, and it holds a round until the check-ins it meets predict that the round will fill
    (docs/fleet-file.md, "`pacing`"; :mod:`fleetsim.pacing`)."""

    margin: Real = Field(default=1.2, ge=1.0, le=100.0)
    fill_time: PositiveDuration | None = Field(default=None, description="default: half the selection timeout")
    min_wait: Duration | None = Field(default=None, ge=0, description="default: the check-in period")
    max_wait: PositiveDuration = 6 * 3600.0
    lookback: PositiveDuration = 300.0
    recheck: PositiveDuration = 60.0

    def return_rate(self, accept_count: int, selection_timeout: float) -> float:
        """Check-ins per second the server asks for: margin x the check-ins a round accepts,
        over the planned fill time."""
        fill = self.fill_time if self.fill_time is not None else selection_timeout / 2.0
        return self.margin * accept_count / fill
