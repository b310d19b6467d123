"""``impact``: the invented task and model the model-impact replay trains on the run's rounds.

The section describes a synthetic classification task (``features``, ``classes``, the
``signal`` of its true logits), the model trained on it (multinomial logistic regression or a
one-hidden-layer network), the client and server steps, the held-out test sets and how each
device type and region shifts its data away from the others (``shift``, ``by_device_type``,
``by_region``). Data and model are stand-ins for a team's own: the replay shows how the
participation of a run would weigh on a model of this kind, not on any real one. The engine
does not read this block; it changes the config hash only. Absent, every key has its default.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import AfterValidator, Field, ValidationInfo

from .fields import Count, Real, _at, _show, _Strict

__all__ = ["GroupShift", "ImpactSettings", "FleetImpact", "DEFAULT_SHIFT"]


class GroupShift(_Strict):
    """How far one device type's or one region's data lies from the shared task.

    ``feature_shift``: length of the shift of the feature mean (in feature standard
    deviations) along a direction of the group's own: the inputs move, the true labelling
    rule does not. ``label_skew``: standard deviation of an offset added to the true class
    log-odds, so that some classes are commoner in the group. ``concept_shift``: size of a
    labelling rule of the group's own added to the shared one, relative to the shared one
    (1: as large as it): the same input is labelled differently, which a model never trained
    on the group cannot learn. A key left out takes the value of ``impact.shift`` (in a
    ``by_device_type`` or ``by_region`` entry) or its built-in default (in ``impact.shift``).
    """

    feature_shift: Real | None = Field(default=None, ge=0, le=100)
    label_skew: Real | None = Field(default=None, ge=0, le=100)
    concept_shift: Real | None = Field(default=None, ge=0, le=100)

    def over(self, base: GroupShift) -> GroupShift:
        """These amounts, each left-out one taken from ``base``."""
        return GroupShift(**{key: getattr(self, key) if getattr(self, key) is not None else getattr(base, key)
                        for key in GroupShift.model_fields})


DEFAULT_SHIFT = GroupShift(feature_shift=1.0, label_skew=0.5, concept_shift=0.5)
"""Every device type's and region's shift when the file gives none: visible but moderate."""


class ImpactSettings(_Strict):
    """The synthetic task and model of the model-impact replay (docs/impact.md).

    Invented stand-ins: ``features`` standard-normal inputs (moved by each group's feature
    shift) labelled into ``classes`` classes by a softmax of true logits whose scale is
    ``signal``; the model is ``logistic`` (multinomial logistic regression) or ``mlp`` (one
    hidden layer of ``hidden`` tanh units). Each client takes SGD steps of ``learning_rate``
    on its own examples (with L2 ``weight_decay``); the server moves the model by
    ``server_learning_rate`` times the aggregated update (1: plain Federated Averaging).
    ``test_examples`` held-out examples per (device type, region) pair measure the model every
    ``eval_every`` committed rounds and after the last.
    """

    features: Count = Field(default=16, ge=1, le=1000)
    classes: Count = Field(default=4, ge=2, le=100)
    signal: Real = Field(default=3.0, gt=0, le=100, description="scale of the true logits")
    model: Literal["logistic", "mlp"] = "logistic"
    hidden: Count = Field(default=32, ge=1, le=4096, description="hidden units of the mlp")
    learning_rate: Real = Field(default=0.1, gt=0, le=100, description="client SGD step")
    server_learning_rate: Real = Field(default=1.0, gt=0, le=100)
    weight_decay: Real = Field(default=0.0, ge=0, le=100, description="L2 penalty of the local loss")
    test_examples: Count = Field(default=1000, ge=1, le=100_000, description="per (type, region) pair")
    eval_every: Count = Field(default=50, ge=1, le=10_000_000, description="committed rounds")
    shift: GroupShift = DEFAULT_SHIFT
    by_device_type: dict[str, GroupShift] = Field(default_factory=dict)
    by_region: dict[str, GroupShift] = Field(default_factory=dict)

    def base_shift(self) -> GroupShift:
        """``shift`` with its left-out keys at their built-in defaults."""
        return self.shift.over(DEFAULT_SHIFT)

    def type_shift(self, name: str) -> GroupShift:
        """The amounts of device type ``name``."""
        return self.by_device_type.get(name, GroupShift()).over(self.base_shift())

    def region_shift(self, name: str) -> GroupShift:
        """The amounts of region ``name``."""
        return self.by_region.get(name, GroupShift()).over(self.base_shift())


def _known_groups(value: ImpactSettings | None, info: ValidationInfo) -> ImpactSettings | None:
    """Refuse a ``by_device_type`` or ``by_region`` name the fleet does not have."""
    fleet = info.data.get("fleet")
    if value is None or fleet is None:  # no section, or the fleet itself failed (reported there)
        return value
    for key, known in (("by_device_type", fleet.device_types), ("by_region", fleet.regions)):
        for name in getattr(value, key):
            if name not in known:
                raise ValueError(_at(f"{key}.{name}", f"unknown name {_show(name)}; "
                                     f"expected one of {', '.join(known)}"))
    return value


FleetImpact = Annotated[ImpactSettings | None, AfterValidator(_known_groups)]
"""The type of ``Config.impact``: optional settings whose type and region names the fleet has."""
