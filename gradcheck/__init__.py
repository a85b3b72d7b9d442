"""gradcheck: verify hand-written gradients against independent references, and say what is wrong.

The whole public API is a handful of verbs and the results they return; every
name below is re-exported from a private module that does one job.
"""

from ._api.examine import assert_backprop, examine, reference
from ._api.layer import examine_layer
from ._case.file import Case, load_case, read_description, save_case
from ._case.network import (
    LayerDescription,
    LayerProbes,
    NetworkDescription,
    NetworkLoss,
    describe_network,
)
from ._core.errors import BackpropMismatch, InputError
from ._layers.stress import stress_inputs
from ._report.results import (
    Finding,
    LayerResult,
    ReferenceSummary,
    Report,
    TensorResult,
)

__all__ = [
    "examine",
    "assert_backprop",
    "reference",
    "examine_layer",
    "stress_inputs",
    "Report",
    "Finding",
    "TensorResult",
    "LayerResult",
    "ReferenceSummary",
    "BackpropMismatch",
    "InputError",
    "save_case",
    "load_case",
    "read_description",
    "describe_network",
    "Case",
    "NetworkDescription",
    "LayerDescription",
    "LayerProbes",
    "NetworkLoss",
]

__version__ = "0.1.0"
