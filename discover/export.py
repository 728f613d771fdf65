"""Exports of an identified model into the forms the next tool takes.

From a :class:`discover.Model` (or a ``model.json`` path):

* :func:`to_python_module`: a standalone Python module needing only numpy, with a
  vectorised ``rhs(t, x, u)`` for :func:`scipy.integrate.solve_ivp`;
* :func:`to_latex`: the equations as a LaTeX ``align`` environment;
* :func:`linear_matrices`: A, B and an offset for a model whose every term is a
  constant, a state or an input;
* :func:`linearize`: the Jacobian linearization A, B at an operating point, by
  analytic derivatives of the terms (:mod:`discover.symbolic`), with the
  equilibrium residual f(x_op, u_op);
* :func:`to_state_space`: a ``control.StateSpace`` when the optional python-control
  package is installed.

Generated code and LaTeX come from the parsed syntax trees by a whitelist walk:
names become ``x[i]`` / ``u[j]``, functions ``np.sin`` etc., numbers
``repr(float)``. No text from the model file is spliced into code, and names
appear in generated code only as ``repr()`` string literals.

Errors: :class:`~discover.exceptions.ExportError` (exit code 7) when the export's
arguments do not fit the model (operating point, format, output path, a nonlinear
model for a linear export); :class:`~discover.exceptions.ModelFileError` (exit
code 5) when the model itself is at fault. JSON is written as UTF-8 with
non-ASCII characters kept as they are, and never holds NaN or infinity.

This module holds the command ``discover export`` (:func:`export_main`), the format
names :data:`FORMATS` and the writing of files (:func:`export_text`,
:func:`write_export`); the exports themselves are written in
:mod:`discover.export_python`, :mod:`discover.export_latex` and
:mod:`discover.export_linear`, and re-exported here.
"""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

import numpy as np

from .exceptions import ExportError, ModelFileError
from .export_latex import LATEX_DIGITS, latex_name, latex_number, to_latex
from .export_linear import (
    CONTROL_HINT,
    NonlinearModelError,
    linear_matrices,
    linearize,
    state_space_matrices,
    to_state_space,
)
from .export_python import to_python_module
from .export_terms import as_model
from .model import load_model

# The exports' public names, importable from here wherever they are written.
__all__ = [
    "CONTROL_HINT", "FORMATS", "LATEX_DIGITS", "LINEAR_FORMAT", "ExportError", "NonlinearModelError",
    "export_main", "export_text", "latex_name", "latex_number", "linear_matrices", "linearize",
    "parse_point", "to_latex", "to_python_module", "to_state_space", "write_export",
]

FORMATS = ("python", "latex", "linear", "linearize", "control")
LINEAR_FORMAT = "discover-linear/1"


def _refuse_non_finite(matrices, fmt):
    """One located line for the first NaN or infinity in the matrices: JSON cannot hold them.

    With an operating point (``x_op`` in ``matrices``) it is an :class:`ExportError`
    (choose another point); without one the model's own coefficients overflow
    float64, a :class:`ModelFileError`.
    """
    states, inputs = matrices["states"], matrices["inputs"]
    found = []  # (where, value, state) of every non-finite entry, in the order A, B, offset, residual
    for key, columns in (("A", states), ("B", inputs), ("offset", None), ("residual", None)):
        if key in matrices:
            values = np.asarray(matrices[key], dtype=float)
            for index in np.argwhere(~np.isfinite(values)):
                row = int(index[0])
                where = (f"{key}[{states[row]}, {columns[int(index[1])]}]" if columns is not None
                         else f"{key}[{states[row]}]")
                found.append((where, values[tuple(index)], states[row]))
    if not found:
        return
    where, value, state = found[0]
    more = f" (and {len(found) - 1} more non-finite entries)" if len(found) > 1 else ""
    what = f"the {fmt} export has {where} = {value} in the equation of d({state})/dt{more}"
    if "x_op" in matrices:
        point = dict(zip(list(states) + list(inputs), np.concatenate([matrices["x_op"], matrices["u_op"]]).tolist()))
        raise ExportError(f"{what} at the operating point {point}; JSON holds only finite numbers. "
                          "Choose an operating point where f(x, u) and its slopes are finite.")
    raise ModelFileError(f"{what}; JSON holds only finite numbers. The model's coefficients "
                         "overflow float64 there: check the model file.")


def _json_document(matrices, kind):
    document = {"format": LINEAR_FORMAT, "kind": kind, "states": matrices["states"], "inputs": matrices["inputs"]}
    if kind == "linear":
        document["equation"] = "dx/dt = A x + B u + offset"
    else:
        document["equation"] = "dx/dt ≈ residual + A (x - x_op) + B (u - u_op)"
    if "outputs" in matrices:  # a model with hidden states or further outputs: y = C x + D u + output_offset
        document["outputs"] = list(matrices["outputs"])
        document["output_equation"] = "y = C x + D u + output_offset"
    for key in ("A", "B", "C", "D", "offset", "residual", "x_op", "u_op", "output_offset"):
        if key in matrices:
            document[key] = np.asarray(matrices[key], dtype=float).tolist()
    return document


def _matrices_csv(matrices):
    """One row per state: A's columns, B's columns, then the offset or residual."""
    import csv
    import io

    extra = "offset" if "offset" in matrices else "residual"
    handle = io.StringIO()
    writer = csv.writer(handle, lineterminator="\n")
    writer.writerow(["state"] + [f"A[{s}]" for s in matrices["states"]]
                    + [f"B[{u}]" for u in matrices["inputs"]] + [extra])
    for i, state in enumerate(matrices["states"]):
        writer.writerow([state] + [repr(float(v)) for v in matrices["A"][i]]
                        + [repr(float(v)) for v in matrices["B"][i]] + [repr(float(matrices[extra][i]))])
    return handle.getvalue()


def export_text(model, fmt, *, x_op=None, u_op=None, csv=False):
    """The text of one export format (see :func:`write_export`)."""
    model = as_model(model)
    if fmt not in FORMATS:
        raise ExportError(f"export format must be one of {', '.join(FORMATS)}. Got {fmt!r}.")
    if fmt == "python":
        return to_python_module(model)
    if fmt == "latex":
        return to_latex(model)
    if fmt == "control" and csv:
        raise ExportError("the 'control' export is JSON (A, B, C, D); write it to a .json file.")
    # An overflow or NaN is refused below in one located line, so numpy's warning would only repeat it.
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        if fmt == "linear":
            matrices, kind = linear_matrices(model), "linear"
        elif fmt == "linearize":
            matrices, kind = linearize(model, x_op, u_op), "linearized"
        else:
            matrices, kind = state_space_matrices(model, x_op, u_op)
    _refuse_non_finite(matrices, fmt)
    if csv:
        return _matrices_csv(matrices)
    # Characters such as '≈' as they are: the file is UTF-8, as JSON between systems must
    # be (RFC 8259, section 8.1).
    return json.dumps(_json_document(matrices, kind), indent=2, allow_nan=False, ensure_ascii=False) + "\n"


def write_export(model, fmt, out_path, *, x_op=None, u_op=None):
    """Write one export of a model to ``out_path``.

    Parameters
    ----------
    model : Model or path-like
    fmt : {"python", "latex", "linear", "linearize", "control"}
        ``python``: a module (:func:`to_python_module`); ``latex``: an ``align*``
        environment (:func:`to_latex`); ``linear``: A, B, offset (:func:`linear_matrices`);
        ``linearize``: A, B, residual at ``x_op``, ``u_op`` (:func:`linearize`);
        ``control``: A, B, C, D of the state-space form (C = I, D = 0), linear or,
        given ``x_op``, linearized; load it with ``control.ss(d["A"], d["B"], d["C"], d["D"])``.
        The matrix formats are JSON (``format: discover-linear/1``), or one CSV table
        ``state, A[...], B[...], offset|residual`` when ``out_path`` ends in ``.csv``.
        Every file is written as UTF-8; JSON keeps non-ASCII characters as they are.
    out_path : path-like
    x_op, u_op : array-like, optional
        The operating point (needed by ``linearize``; optional for ``control``).

    Returns
    -------
    pathlib.Path
        The file written.

    Raises
    ------
    ExportError
        Unknown format, a bad operating point, an output that cannot be written,
        or a NaN or infinity in the matrices at the operating point.
    ModelFileError
        The model file cannot be read, or (without an operating point) its
        coefficients give a NaN or infinity in the matrices.
    """
    out_path = Path(out_path)
    text = export_text(model, fmt, x_op=x_op, u_op=u_op,
                       csv=out_path.suffix.lower() == ".csv" and fmt in ("linear", "linearize", "control"))
    try:
        out_path.write_text(text, encoding="utf-8")
    except OSError as err:
        raise ExportError(f"{out_path}: cannot write the export ({err.strerror or err}).") from None
    return out_path


def parse_point(text, names, option):
    """``"0, 1.5"`` -> array of floats for a command-line option; None stays None."""
    if text is None:
        return None
    pieces = [p.strip() for p in str(text).split(",")] if str(text).strip() else []
    try:
        values = [float(p) for p in pieces]
    except ValueError:
        raise ExportError(
            f"{option} must be comma-separated numbers in the order {', '.join(names)}. Got {text!r}."
        ) from None
    if not all(math.isfinite(v) for v in values):
        raise ExportError(f"{option} must be finite numbers (no nan or inf). Got {text!r}.")
    if len(values) != len(names):
        raise ExportError(
            f"{option} must have {len(names)} values (order {', '.join(names) or 'none'}). Got {len(values)}: {text!r}."
        )
    return np.array(values)


def _write_stdout(text):
    """Print an export; as UTF-8 bytes where the console's encoding lacks a character ('≈')."""
    try:
        sys.stdout.write(text)
    except UnicodeEncodeError:
        # The text stream encodes the whole string before writing, so nothing went out yet.
        sys.stdout.flush()
        sys.stdout.buffer.write(text.encode("utf-8"))
        sys.stdout.buffer.flush()


def export_main(args):
    """The ``discover export`` command.

    ``args`` has ``model`` (path to model.json), ``to`` (a format of :data:`FORMATS`),
    ``out`` (file to write; None or ``"-"`` prints to standard output), ``x_op`` and
    ``u_op`` (comma-separated numbers in state / input order, or None).
    Errors in these arguments raise :class:`ExportError` (exit code 7), a model
    file that cannot be read :class:`ModelFileError` (exit code 5).
    """
    model = load_model(args.model)
    x_op = parse_point(args.x_op, model.state_names, "--x-op")
    u_op = parse_point(args.u_op, model.input_names, "--u-op")
    if args.to == "linearize" and x_op is None:
        raise ExportError(f"--to linearize needs --x-op (order {', '.join(model.state_names)})"
                          + (f" and --u-op (order {', '.join(model.input_names)})." if model.input_names else "."))
    if args.out is None or args.out == "-":
        _write_stdout(export_text(model, args.to, x_op=x_op, u_op=u_op))
        return 0
    target = write_export(model, args.to, args.out, x_op=x_op, u_op=u_op)
    print(f"Wrote the {args.to} export of {args.model} to {target}")
    return 0
