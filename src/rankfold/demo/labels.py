"""Per-sample labels of the demo data, for colouring the report's scatter.

The planted groups are known only to the generators (the stored tables carry
ids, not group names), so the demo passes them to the report as ``labels=``.
"""

from __future__ import annotations

import numpy as np

from rankfold.demo.fleet import FleetTruth
from rankfold.demo.panel import PanelTruth
from rankfold.demo.summary import _founder_label, _order_of

CROSS = "cross of two founders"


def panel_labels(result, truth: PanelTruth) -> np.ndarray | None:
    """Founder group of every line in the result's sample order ("founder A", ..., or the cross label).

    None when the result's samples cannot be matched to the panel's lines.
    """
    names = np.array([f"founder {_founder_label(f)}" for f in range(truth.n_founders)] + [CROSS], dtype=object)
    codes = np.where(truth.admixed, truth.n_founders, truth.founder)
    ids = getattr(result, "sample_ids", None)
    if ids is None:
        return names[codes] if result.n_samples == truth.line_ids.size else None
    # the result's i-th sample is the panel's line order[i]
    position = _order_of(truth.line_ids, ids)
    return None if position is None else names[codes[position]]


def fleet_labels(result, truth: FleetTruth) -> np.ndarray | None:
    """Fault status of every record: steady machine, faulty machine before its fault, after fault onset.

    Records are stored machine after machine (files of whole machines, in
    machine order), ``records_per_machine`` each, so a record's machine and
    record number follow from its row.  None when the counts disagree.
    """
    per = truth.records_per_machine
    n = len(truth.machine_ids) * per
    if result.n_samples != n:
        return None
    names = np.array(["steady machine", "faulty machine, before its fault", "after fault onset"], dtype=object)
    codes = np.zeros(n, dtype=np.int8)
    for machine, start in truth.drift_start.items():
        first = truth.machine_ids.index(machine) * per
        codes[first:first + per] = 1
        codes[first + start:first + per] = 2
    return names[codes]
