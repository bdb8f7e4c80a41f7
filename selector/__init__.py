"""selector: find luminous quasar candidates by cross-matching an astrometric and an infrared catalogue.

The public functions live in :mod:`selector.api` and are re-exported here: ``load_config``, ``ingest``,
``run``, ``status``, ``train``, ``tune``, ``targets``, ``outcomes``, ``weigh`` and ``report``, each with the
configuration first, options by keyword, a ``log`` callable and a result object back. They are
loaded on first use, so ``selector --version`` does not pay for the science libraries. See README.md
for the command-line tour and DEVELOPERS.md for the architecture.
"""

from importlib import import_module
from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("selector")
except PackageNotFoundError:  # running from a source tree that was not installed
    __version__ = "0.1.0"

#: Public name → the module that defines it.
_PUBLIC = {
    "load_config": "selector.api", "ingest": "selector.api", "run": "selector.api", "status": "selector.api",
    "train": "selector.api", "tune": "selector.api", "targets": "selector.api", "outcomes": "selector.api",
    "report": "selector.api", "weigh": "selector.api", "Config": "selector.settings.config",
    "config_hash": "selector.settings.config", "from_dict": "selector.settings.config", "SelectorError": "selector.errors", "ConfigError": "selector.errors",
    "InputError": "selector.errors",
}

__all__ = ["__version__", *sorted(_PUBLIC)]


def __getattr__(name: str):
    # PEP 562: the face resolves a public name when it is first asked for, then keeps it
    if name in _PUBLIC:
        value = getattr(import_module(_PUBLIC[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'selector' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_PUBLIC))
