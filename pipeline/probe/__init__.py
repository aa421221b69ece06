"""Downstream probe: train a compact CenterNet on real and real + synthetic data, score it on real test data.

Modules, one job each: :mod:`.targets` (heatmap, size and offset targets), :mod:`.network` (the model),
:mod:`.losses`, :mod:`.decode` (peaks to boxes), :mod:`.training` (train and predict), :mod:`.evaluation`
(COCOeval), :mod:`.experiment` (the conditions, merges and repeats), :mod:`.results` (table and plot).
"""

from .evaluation import Evaluation, evaluate
from .experiment import ProbeResult, ProbeRun, run_probe
from .results import write_results
from .training import TrainSettings, predict, prepare, train_detector

__all__ = [
    "Evaluation",
    "ProbeResult",
    "ProbeRun",
    "TrainSettings",
    "evaluate",
    "predict",
    "prepare",
    "run_probe",
    "train_detector",
    "write_results",
]
