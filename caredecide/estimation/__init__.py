"""Transition estimates from patient records (synthetic or real cohort data).

* :mod:`.records` - visits and patient tables -> observation intervals (validated).
* :mod:`.counts` - regular-interval observations: counts, ``n_ij / n_i``, Dirichlet rows.
* :mod:`.panel` - irregular panel observations: maximum-likelihood continuous-time rates.
* :mod:`.to_model` - estimates -> model-file parameters with their source recorded.
"""

from caredecide.estimation.counts import CountEstimate, estimate_counts
from caredecide.estimation.panel import PanelEstimate, estimate_panel, transition_structure
from caredecide.estimation.records import CohortRecords, load_records, records_from_frames

__all__ = [
    "CohortRecords",
    "CountEstimate",
    "PanelEstimate",
    "estimate_counts",
    "estimate_panel",
    "load_records",
    "records_from_frames",
    "transition_structure",
]
