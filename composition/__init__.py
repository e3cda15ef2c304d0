"""composition: weight-space analysis of head-to-head composition in transformers.

For every (writer, responder) pair of attention heads, rank the diagonal of the factored
writer-OV-into-responder-QK token matrix over the whole vocabulary, and label responders
attention-raising or attention-lowering. Predictions from weights alone: they rank
candidates for causal experiments, they are not causal evidence.
"""

from ._version import __version__  # noqa: E402

from .extract import load_weights  # noqa: E402
from .errors import CompositionError  # noqa: E402
from .score.ranks import diagonal_midranks  # noqa: E402
from .run.scan import ScanOptions, run_scan  # noqa: E402
from .store.scanfile import load_scan  # noqa: E402
from .extract.tables import TableOptions, token_table  # noqa: E402

__all__ = [
    "CompositionError",
    "ScanOptions",
    "TableOptions",
    "diagonal_midranks",
    "load_scan",
    "load_weights",
    "run_scan",
    "token_table",
]
