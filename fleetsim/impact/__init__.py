"""Model impact: what a run's participation costs a model, on an invented task.

:func:`model_impact` replays the committed rounds of a run, with exactly the devices each
used and their FedAvg weights, training a synthetic model (:mod:`.train`) on synthetic
non-IID data (:mod:`.data`), and reports accuracy and loss by device type, region and data
quartile (:mod:`.replay`; docs/impact.md). Data and model are stand-ins for a team's own.
No file I/O, no command line.
"""

from .replay import GROUPINGS, IMPACT_CAUTION, ImpactResult, model_impact

__all__ = ["model_impact", "ImpactResult", "IMPACT_CAUTION", "GROUPINGS"]
