"""diskfield: protoplanetary-disk magnetic-field models fitted to meteorite paleointensities."""
from __future__ import annotations

__version__ = "0.1.0"

from .errors import (  # noqa: E402
    CompilationError,
    DiskfieldError,
    OptionError,
    PriorFileError,
)
from .records import read_compilation  # noqa: E402
from .likelihood import build_model  # noqa: E402
from .runs import fit, fit_model, load_comparison, load_fit  # noqa: E402
from .comparison import compare  # noqa: E402
from .evidence import nested_evidence  # noqa: E402

__all__ = [
    "__version__",
    "DiskfieldError",
    "CompilationError",
    "PriorFileError",
    "OptionError",
    "read_compilation",
    "build_model",
    "fit",
    "fit_model",
    "compare",
    "nested_evidence",
    "load_fit",
    "load_comparison",
]
