"""The stages as Python functions on in-memory arrays and tables, for chaining after a model.

Each function mirrors a command and is the one its stage's folder defines (the commands call the
same functions): :func:`lesion_table` is ``volumes`` (``pipeline.volumes.stage``),
:func:`track_lesions` is ``match`` (``pipeline.matching.stage``), :func:`fit_growth` is ``fit``
(``pipeline.growth.stage``). Nothing here reads or writes files. Research use only;
see ``pipeline.DISCLAIMER``.

Examples
--------
>>> import numpy as np
>>> def mask(r):
...     m = np.zeros((30, 30, 30), np.uint8); m[15 - r:15 + r, 15 - r:15 + r, 15 - r:15 + r] = 1
...     return m
>>> scans = [("P1", str(s), day, mask(r), np.eye(4))
...          for s, (day, r) in enumerate([(0, 3), (30, 4), (60, 5), (90, 6)], start=1)]
>>> lesions, labelled = lesion_table(scans)
>>> lesions.volume_mm3.tolist()
[216.0, 512.0, 1000.0, 1728.0]
>>> matches, longitudinal, assignment = track_lesions(lesions, labelled)
>>> longitudinal.lesion.tolist(), longitudinal.status.tolist()
([1, 1, 1, 1], ['present', 'present', 'present', 'present'])
>>> fits, group_fits, unfitted = fit_growth(longitudinal)
>>> sorted(fits.model.unique().tolist())
['exponential', 'gompertz', 'logistic', 'power', 'surface']
"""
from __future__ import annotations

from pipeline.growth.stage import fit_growth
from pipeline.matching.stage import track_lesions
from pipeline.volumes.stage import ScanInput, lesion_table

__all__ = ["ScanInput", "fit_growth", "lesion_table", "track_lesions"]
