"""Training side: labelled logs, the training table, fitting, evaluation and the report.

scikit-learn and pandas are imported only below this package, so the serving path (and the
HTTP service) never loads them.
"""

from __future__ import annotations

from .evaluate import Evaluation, evaluate
from .logs import LabelledClue, LogReport, read_logs, write_labelled
from .table import PrefixPlan, TrainingTable, build_table
from .train import TrainResult, train

__all__ = [
    "Evaluation",
    "LabelledClue",
    "LogReport",
    "PrefixPlan",
    "TrainResult",
    "TrainingTable",
    "build_table",
    "evaluate",
    "read_logs",
    "train",
    "write_labelled",
]
