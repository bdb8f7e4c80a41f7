"""selector: find luminous quasar candidates by cross-matching an astrometric and an infrared catalogue.

The public entry points are re-exported here; see README.md for the command-line tour and
DEVELOPERS.md for the architecture.
"""

from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("selector")
except PackageNotFoundError:  # running from a source tree that was not installed
    __version__ = "0.1.0"

from .config import Config, config_hash, from_dict, load_config  # noqa: E402
from .errors import ConfigError, InputError, SelectorError  # noqa: E402

__all__ = ["Config", "ConfigError", "InputError", "SelectorError", "__version__", "config_hash", "from_dict",
           "load_config"]
