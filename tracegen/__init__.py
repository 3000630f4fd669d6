"""tracegen: curate measured network-path traces, model them, synthesise more and measure the gap."""

__version__ = "0.1.0"

from .errors import CatalogError, InputError, SelectionError, TracegenError  # noqa: E402
from .trace import Trace  # noqa: E402
from .fit import fit  # noqa: E402  (the function deliberately shadows the subpackage's name)
from .model import PathModel, load as load_model  # noqa: E402
from .synth import synth  # noqa: E402  (likewise)
from .compare import coverage  # noqa: E402

__all__ = ["fit", "synth", "coverage", "load_model", "PathModel", "Trace", "TracegenError", "InputError", "CatalogError", "SelectionError", "__version__"]
