"""bandwatch: vibration band monitoring for rotating machines.

The public surface is small: `load_config`, `Monitor`, and the exceptions in
`monitor.errors`. Everything else is internal and may change.
"""

__version__ = "0.1.0"

from .config import load as load_config  # noqa: E402
from .errors import BandwatchError, ConfigError, DeliveryError, SourceError  # noqa: E402

__all__ = [
    "__version__",
    "load_config",
    "BandwatchError",
    "ConfigError",
    "DeliveryError",
    "SourceError",
]
