"""Realism audit: how far a run's synthetic instances are from real held-out ones, per class.

Independent of the generator and its filters: every figure compares crops of the run's new instances
with crops of a real split no synthetic image was made from.

* :mod:`.two_sample`: a CNN's held-out accuracy at telling real from synthetic crops (0.5 = no
  difference), with the same test between two halves of the real crops as the floor;
* :mod:`.features`: improved precision and recall (k = 3) in a feature space learned from the real
  training crops, with real half against real half as the reference; near-copies of training crops;
* :mod:`.sharpness`: edge strength by box-height band; how tightly boxes fit a known silhouette;
* :mod:`.instances`: which instances are audited and their crop geometry;
* :mod:`.core`: :func:`audit_run`, which writes ``RUN_DIR/audit.json`` for the report.
"""

from .core import AUDIT_JSON, audit_run, read_audit

__all__ = ["AUDIT_JSON", "audit_run", "read_audit"]
