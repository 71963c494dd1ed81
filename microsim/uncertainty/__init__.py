"""Parameter uncertainty: PSA draws, the resumable outer loop on parallel backends,
one-way sensitivity, and PSA summaries.

The model itself is a callable handed in, so nothing here knows about engines."""
from .draws import Correlation, DirichletGroup, parameter_draws
from .loop import run_draws
from .one_way import one_way
from .summaries import summarise_draws

__all__ = ["Correlation", "DirichletGroup", "parameter_draws", "run_draws", "one_way", "summarise_draws"]
