"""``workload.privacy``: the differentially private aggregation a workload trains with.

Each used update is clipped to an L2 norm of ``clipping_norm`` and the server adds Gaussian
noise of standard deviation ``noise_multiplier`` x ``clipping_norm`` to the sum of a round's
updates. The engine does not read this block (it changes no device's work); the privacy
accounting of :mod:`fleetsim.metrics.privacy` and the model replay read it.
"""

from __future__ import annotations

from pydantic import Field

from .fields import Real, _Strict

__all__ = ["Privacy"]


class Privacy(_Strict):
    """Clipping and noise of one workload's aggregation, and the delta its epsilon is quoted at.

    ``delta`` unset or null: 1 / the fleet's devices (the accounting fills it in, as it
    depends on the fleet, not on the workload)."""

    clipping_norm: Real = Field(gt=0, le=1e9, description="L2 norm each update is clipped to")
    noise_multiplier: Real = Field(gt=0, le=1e6, description="noise std on the sum / clipping_norm")
    delta: Real | None = Field(default=None, gt=0, lt=1, description="delta of the (epsilon, delta) figures")
