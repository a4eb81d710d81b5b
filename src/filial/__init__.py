"""filial: multi-generation self-distillation around your own PyTorch training loop.

Generation 0 learns from the labels; every later generation is a freshly initialised student
trained on the previous generation's cached predictions. Held-out data decide when more generations
stop helping, and the best student is kept. Start with :class:`Lineage`.
"""

from .fit import fit_epochs
from .generation import Generation
from .lineage import Lineage, Result
from .pool import Admission
from .spectral import forecast_run
from .stopping import Decision, StopRule
from .store import TargetStore

__all__ = [
    "Admission",
    "Decision",
    "Generation",
    "Lineage",
    "Result",
    "StopRule",
    "TargetStore",
    "fit_epochs",
    "forecast_run",
]
__version__ = "0.1.0"
