"""discover: identify sparse dynamical models dx/dt = f(x, u) with input terms from logged runs.

The main entry points:

* :func:`discover.run` runs the pipeline from a TOML config (path or dict);
* :func:`discover.load_model` reads a ``model.json`` back into a model that
  evaluates ``rhs(x, u)`` and ``simulate(t, x0, u)``.

The heavy modules (numpy, scipy, pandas, matplotlib, pysindy) load on first use,
so ``discover --help`` and ``--version`` answer at once.
"""

from importlib import import_module

from .exceptions import ConfigError, DataError, DiscoverError, ExpressionError, ModelFileError, OutputError

__version__ = "0.2.0"

#: Public names and the module that defines each, imported when first asked for.
_LAZY = {
    "Model": "model",
    "load_model": "model",
    "Result": "pipeline",
    "run": "pipeline",
    "write_outputs": "outputs",
}

__all__ = ["ConfigError", "DataError", "DiscoverError", "ExpressionError", "ModelFileError", "OutputError",
           *_LAZY]


def __getattr__(name):
    if name in _LAZY:
        value = getattr(import_module(f".{_LAZY[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'discover' has no attribute {name!r}")
