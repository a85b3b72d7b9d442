"""gradcheck: verify hand-written gradients against independent references, and say what is wrong.

The whole public API is a handful of verbs and the results they return; every
name below is re-exported from a private module that does one job.
"""

from ._case import Case, load_case, read_description, save_case
from ._casenet import LayerDescription, LayerProbes, NetworkDescription, NetworkLoss, describe_network
from ._errors import BackpropMismatch, InputError
from ._examine import assert_backprop, examine, reference
from ._layer import examine_layer
from ._stress import stress_inputs
from ._report import Finding, LayerResult, ReferenceSummary, Report, TensorResult

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
