"""discover: identify sparse dynamical models dx/dt = f(x, u) with input terms from logged runs.

The main entry points:

* :func:`discover.run` runs the pipeline from a TOML config (path or dict);
* :func:`discover.load_model` reads a ``model.json`` back into a model that
  evaluates ``rhs(x, u)`` and ``simulate(t, x0, u)``.
"""

from .exceptions import ConfigError, DataError, DiscoverError, ExpressionError, ModelFileError, OutputError
from .model import Model, load_model
from .pipeline import Result, run, write_outputs

__all__ = [
    "ConfigError",
    "DataError",
    "DiscoverError",
    "ExpressionError",
    "Model",
    "ModelFileError",
    "OutputError",
    "Result",
    "load_model",
    "run",
    "write_outputs",
]

__version__ = "0.1.0"
