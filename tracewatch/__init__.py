"""tracewatch — log and execution-trace anomaly detection for the people on call.

Data flow (one pipeline for batch commands and the daemon):

    sources → formats → templates → sessions → features → model → alerts

The public surface fits on this screen; everything else is an implementation detail.
"""

from __future__ import annotations

__version__ = "0.1.0"

from .config import Config, load_config  # noqa: E402
from .errors import (BaselineError, ConfigError, InputError, NoBaselineError,  # noqa: E402
                     StateError, TracewatchError)

__all__ = [
    "BaselineError", "Config", "ConfigError", "InputError", "NoBaselineError", "StateError",
    "TracewatchError", "__version__", "load_config",
]
