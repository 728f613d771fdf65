"""The model an export reads: a :class:`discover.Model` or a ``model.json`` path, and its kept terms.

Shared by the exports (:mod:`discover.export_python`, :mod:`discover.export_latex`,
:mod:`discover.export_linear`): each walks the terms' syntax trees as the whitelist
parser of :mod:`discover.expressions` checked them, never the model file's text.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .expressions import parse_expression
from .model import Model, load_model


def as_model(model):
    """A :class:`discover.Model` as it is, or the one loaded from a ``model.json`` path."""
    if isinstance(model, Model):
        return model
    if isinstance(model, (str, Path)):
        return load_model(model)
    raise TypeError(f"`model` must be a discover.Model or a path to model.json. Got {type(model).__name__}.")


def kept_trees(model):
    """``[(j, tree)]`` of the terms that any equation keeps, parsed by the whitelist parser."""
    known = tuple(model.state_names) + tuple(model.input_names)
    used = np.flatnonzero(np.any(model.coef != 0, axis=1))
    return [(int(j), parse_expression(model.terms[j], known, where=f"model term {model.terms[j]!r}"))
            for j in used]
