"""tracegen: curate measured network-path traces, model them, synthesise more and measure the gap."""

from .errors import CatalogError, InputError, SelectionError, TracegenError
from .trace import Trace

__version__ = "0.1.0"

__all__ = ["Trace", "TracegenError", "InputError", "CatalogError", "SelectionError", "__version__"]
