"""selector: find luminous quasar candidates by cross-matching an astrometric and an infrared catalogue.

The public functions live in :mod:`selector.api` and are re-exported here: ``load_config``, ``ingest``,
``run``, ``status``, ``train``, ``tune``, ``targets``, ``outcomes``, ``weigh`` and ``report``, each with the
configuration first, options by keyword, a ``log`` callable and a result object back. They are
loaded on first use, so ``selector --version`` does not pay for the science libraries. See README.md
for the command-line tour and DEVELOPERS.md for the architecture.
"""

from importlib import import_module

#: What ``__version__`` is when the package was not installed (running from a source tree).
_SOURCE_VERSION = "0.1.0"
#: The distribution's name on the package index (the import package and the command stay ``selector``;
#: a distribution named ``selector`` on the index is an unrelated project).
DISTRIBUTION = "quasar-selector"

#: Public name → the module that defines it.
_PUBLIC = {
    "load_config": "selector.api", "ingest": "selector.api", "run": "selector.api", "status": "selector.api",
    "train": "selector.api", "tune": "selector.api", "targets": "selector.api", "outcomes": "selector.api",
    "report": "selector.api", "weigh": "selector.api", "Config": "selector.settings.config",
    "config_hash": "selector.settings.config", "from_dict": "selector.settings.config", "SelectorError": "selector.errors", "ConfigError": "selector.errors",
    "InputError": "selector.errors",
}

__all__ = ["__version__", *sorted(_PUBLIC)]


def _installed_version() -> str:
    """The installed distribution's version, from its ``quasar_selector-<version>.dist-info`` folder name.

    The folder name carries the version by the packaging standard (PEP 376), and the first one on
    ``sys.path`` is the one imported, as ``importlib.metadata`` would find it; that module is not
    used because importing it costs about 0.1 s, more than the rest of ``selector --version``.
    """
    import glob
    import os
    import sys

    # the folder is named after the distribution, normalised (PEP 503 name, "-" written as "_")
    stem = DISTRIBUTION.replace("-", "_") + "-"
    for entry in sys.path:
        found = sorted(glob.glob(os.path.join(glob.escape(entry or "."), stem + "*.dist-info")))
        if found:
            return os.path.basename(found[0])[len(stem):-len(".dist-info")]
    return _SOURCE_VERSION  # running from a source tree that was not installed


def __getattr__(name: str):
    # PEP 562: the face resolves a public name when it is first asked for, then keeps it
    if name == "__version__":
        globals()[name] = value = _installed_version()
        return value
    if name in _PUBLIC:
        value = getattr(import_module(_PUBLIC[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'selector' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_PUBLIC))
