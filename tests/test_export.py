"""Exports of a model: standalone Python module, LaTeX, linear matrices, Jacobian linearization.

Models are built directly from published or textbook equations with their true
coefficients, so every exported matrix can be checked against its closed form.
"""

import ast
import importlib.util
import io
import json
import re
import shutil
import subprocess
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from scipy.integrate import solve_ivp

import discover
from discover import export
from discover.cli import EXAMPLES, main
from discover.exceptions import DiscoverError, ExportError, ModelFileError
from discover.expressions import parse_expression
from discover.report import format_equation
from discover.symbolic import derivative
from systems import BETA, C_FARAD, L_HENRY, LORENZ_INPUT_TRUTH, R_OHM, RHO, SIGMA

# Ship steering: first-order Nomoto model with Norrbin's cubic yaw damping,
# dr/dt = -(1/T) r - (a/T) r**3 + (K/T) rudder, d(heading)/dt = r (Nomoto et al. 1957;
# Norrbin 1963; as in Fossen, Handbook of Marine Craft Hydrodynamics and Motion Control,
# 2011, from memory). T, K, a are those of our demo ship (data_demo/make_ship.py).
T_SHIP, K_SHIP, A_SHIP = 20.0, 0.1, 0.125


def lorenz_model(forced=True):
    # Lorenz (1963): dx/dt = σ(y - x) [+ u], dy/dt = x(ρ - z) - y, dz/dt = xy - βz; the input u
    # on dx/dt is ours (tests/systems.py, LORENZ_INPUT_TRUTH) and leaves A unchanged.
    states = ("x", "y", "z")
    truth = LORENZ_INPUT_TRUTH if forced else {
        s: {t: c for t, c in terms.items() if t != "u"} for s, terms in LORENZ_INPUT_TRUTH.items()}
    terms = tuple(dict.fromkeys(t for s in states for t in truth[s]))
    coef = np.array([[truth[s].get(t, 0.0) for s in states] for t in terms])
    return discover.Model(states, ("u",) if forced else (), terms, coef)


def ship_model(damping="yaw_rate**3"):
    coef = np.array([
        [1.0, -1.0 / T_SHIP],
        [0.0, -A_SHIP / T_SHIP],
        [0.0, K_SHIP / T_SHIP],
    ])
    return discover.Model(("heading", "yaw_rate"), ("rudder",), ("yaw_rate", damping, "rudder"), coef)


def rlc_model():
    # Series RLC, dv/dt = i/C, di/dt = (vin - v - R i)/L (Kirchhoff's voltage law; common practice).
    coef = np.array([
        [1.0 / C_FARAD, -R_OHM / L_HENRY],
        [0.0, -1.0 / L_HENRY],
        [0.0, 1.0 / L_HENRY],
    ])
    return discover.Model(("v", "i"), ("vin",), ("i", "v", "vin"), coef)


def pendulum_model():
    # Damped pendulum with a torque input, dθ/dt = ω, dω/dt = -(g/l) sin θ - c ω + τ
    # (common practice); g/l = 9.81 and c = 0.5 are ours. Greek state and input names.
    coef = np.array([
        [1.0, -0.5],
        [0.0, -9.81],
        [0.0, 1.0],
    ])
    return discover.Model(("theta", "omega_m"), ("tau_1",), ("omega_m", "sin(theta)", "tau_1"), coef)


def function_model():
    """Every function of the term grammar, products, quotients and powers (ours)."""
    terms = ("1", "sin(x)*u", "cos(2*y)", "tan(0.3*x)", "exp(-x**2)", "log(1 + y**2)",
             "sqrt(abs(x*y) + 1)", "tanh(x - y)", "x/(2 + y**2)", "abs(y)**1.5", "x**2*y**3", "-x*u**2")
    rng = np.random.default_rng(3)
    coef = rng.normal(size=(len(terms), 2))
    coef[rng.random(coef.shape) < 0.2] = 0.0
    return discover.Model(("x", "y"), ("u",), terms, coef)


def import_fresh(source, folder, name):
    """Write the module source to a file and import it under a new name (no cache)."""
    path = folder / f"{name}.py"
    path.write_text(source)
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


# --------------------------------------------------------------------------- Python module


@pytest.mark.parametrize("make", [lorenz_model, ship_model, function_model, rlc_model])
def test_exported_module_matches_model_rhs(make, tmp_path):
    model = make()
    module = import_fresh(export.to_python_module(model), tmp_path, f"exported_{make.__name__}")
    assert module.STATES == model.state_names and module.INPUTS == model.input_names
    rng = np.random.default_rng(7)
    x = rng.normal(scale=2.0, size=(50, len(model.state_names)))
    u = rng.normal(size=(50, len(model.input_names)))
    expected = model.rhs(x, u if model.input_names else None)
    u_rows = u.T if model.input_names else None
    # Vectorized call: columns are points, solve_ivp's (n_states, n_points) convention.
    assert_allclose(module.rhs(0.0, x.T, u_rows).T, expected, rtol=1e-12, atol=1e-12)
    # One point at a time, with u as a callable of t.
    for k in range(5):
        u_of = (lambda t, k=k: u[k]) if model.input_names else None
        assert_allclose(module.rhs(0.0, x[k], u_of), expected[k], rtol=1e-12, atol=1e-12)


def test_exported_lorenz_matches_hand_written_equations(tmp_path):
    # Lorenz (1963) written out by hand: the exported code must agree with the equations
    # themselves, not only with the model object.
    module = import_fresh(export.to_python_module(lorenz_model()), tmp_path, "exported_lorenz_hand")
    rng = np.random.default_rng(0)
    x, y, z, u = rng.normal(scale=10.0, size=(4, 40))
    truth = np.array([SIGMA * (y - x) + u, x * (RHO - z) - y, x * y - BETA * z])
    assert_allclose(module.rhs(0.0, np.array([x, y, z]), u[None, :]), truth, rtol=1e-12, atol=1e-9)


def test_model_without_inputs_exports_and_linearizes(tmp_path):
    # Unforced Lorenz (1963): no input at all; u may be omitted everywhere.
    model = lorenz_model(forced=False)
    module = import_fresh(export.to_python_module(model), tmp_path, "exported_lorenz_free")
    assert module.INPUTS == ()
    point = np.array([1.0, -2.0, 20.0])
    assert_allclose(module.rhs(0.0, point), [SIGMA * -3.0, 1.0 * (RHO - 20.0) + 2.0, -2.0 - BETA * 20.0])
    assert_allclose(module.rhs(0.0, point), model.rhs(point), rtol=1e-12)
    result = export.linearize(model, [0.0, 0.0, 0.0])
    assert result["B"].shape == (3, 0)
    assert_allclose(result["A"], [[-SIGMA, SIGMA, 0.0], [RHO, -1.0, 0.0], [0.0, 0.0, -BETA]], rtol=0, atol=1e-10)


def test_solve_ivp_on_exported_module_reproduces_model_simulate(tmp_path):
    # The tool's own simulation (linear input interpolation, LSODA) against
    # scipy.integrate.solve_ivp on the exported rhs with the same input and tolerances, and
    # both against a DOP853 reference at rtol = atol = 1e-12 (scipy, reference library).
    model = ship_model()
    module = import_fresh(export.to_python_module(model), tmp_path, "exported_ship_sim")
    t = np.arange(0.0, 300.0, 0.5)
    rudder = 15.0 * np.sin(2 * np.pi * t / 120.0) + 5.0 * np.sign(np.sin(2 * np.pi * t / 70.0))
    x0 = np.array([0.0, 0.5])

    def u_of(s):
        return np.array([np.interp(s, t, rudder)])

    reference = solve_ivp(module.rhs, (t[0], t[-1]), x0, args=(u_of,), t_eval=t, method="DOP853",
                          rtol=1e-12, atol=1e-12).y.T
    scale = np.abs(reference).max(axis=0)
    # Allowed gap per tolerance pair: about ten times the solver error seen at that pair.
    for rtol, atol, gap in [(1e-6, 1e-9, 1e-4), (1e-10, 1e-12, 1e-7)]:
        mine = model.simulate(t, x0, rudder[:, None], interpolation="linear", method="LSODA", rtol=rtol, atol=atol)
        assert not mine.diverged
        for vectorized in (False, True):
            sol = solve_ivp(module.rhs, (t[0], t[-1]), x0, args=(u_of,), t_eval=t, method="LSODA",
                            rtol=rtol, atol=atol, vectorized=vectorized)
            assert sol.success
            assert np.all(np.abs(sol.y.T - mine.x) <= gap * scale), (rtol, vectorized)
            assert np.all(np.abs(sol.y.T - reference) <= gap * scale), (rtol, vectorized)


def test_generated_code_never_contains_raw_names(tmp_path):
    # A state name is only ever a string literal in the generated module: a name that
    # looks like code must come back as data, and importing must not run it.
    evil = 'z"""\nraise SystemExit("ran code from a name")  # \''
    model = discover.Model(("x", evil), ("u",), ("x", "u"), np.array([[-1.0, 0.0], [2.0, 0.0]]))
    source = export.to_python_module(model)
    tree = ast.parse(source)  # Python's own parser
    assert not any(isinstance(node, ast.Raise) and "ran code" in ast.unparse(node) for node in ast.walk(tree))
    module = import_fresh(source, tmp_path, "exported_evil")
    assert module.STATES == ("x", evil)
    assert_allclose(module.rhs(0.0, np.array([1.0, 3.0]), np.array([0.5])), [0.0, 0.0])
    assert_allclose(module.rhs(0.0, np.array([2.0, 3.0]), np.array([0.5])), [-1.0, 0.0])


def test_exported_module_rejects_wrong_shapes(tmp_path):
    module = import_fresh(export.to_python_module(ship_model()), tmp_path, "exported_shapes")
    with pytest.raises(ValueError, match="x must have 2 rows"):
        module.rhs(0.0, np.zeros(3), np.zeros(1))
    with pytest.raises(ValueError, match="pass u"):
        module.rhs(0.0, np.zeros(2))


# --------------------------------------------------------------------------- symbolic derivatives


X_COLUMNS = {"x": np.linspace(0.2, 1.7, 9), "y": np.linspace(-1.3, 0.9, 9)}
x_, y_ = X_COLUMNS["x"], X_COLUMNS["y"]


@pytest.mark.parametrize("text, truth", [
    # Closed forms from the standard table of derivatives (Abramowitz & Stegun 1964, 4.3.105-
    # 4.3.107, 4.2.x, 4.5.x; common practice), with the chain rule for the inner 2x + y.
    ("sin(2*x + y)", lambda: 2 * np.cos(2 * x_ + y_)),
    ("cos(2*x + y)", lambda: -2 * np.sin(2 * x_ + y_)),
    ("tan(x*y)", lambda: y_ / np.cos(x_ * y_) ** 2),
    ("exp(x*y)", lambda: y_ * np.exp(x_ * y_)),
    ("log(x**2 + 1)", lambda: 2 * x_ / (x_**2 + 1)),
    ("sqrt(x + 3)", lambda: 0.5 / np.sqrt(x_ + 3)),
    ("tanh(3*x)", lambda: 3 / np.cosh(3 * x_) ** 2),
    ("abs(x - 1)", lambda: np.sign(x_ - 1)),
    ("x**3*y", lambda: 3 * x_**2 * y_),
    ("x**-2", lambda: -2 * x_**-3.0),
    ("x**0.5", lambda: 0.5 / np.sqrt(x_)),
    ("y/x", lambda: -y_ / x_**2),
    ("x/(1 + y**2)", lambda: 1 / (1 + y_**2)),
    ("-x*y + 4", lambda: -y_),
    ("x**y", lambda: y_ * x_ ** (y_ - 1)),
    ("2**x", lambda: np.log(2) * 2**x_),
    ("x*abs(x)", lambda: 2 * np.abs(x_)),
    ("y", lambda: np.zeros_like(x_)),
])
def test_symbolic_derivative_matches_table(text, truth):
    slope = derivative(parse_expression(text, ["x", "y"]), "x")
    assert_allclose(slope.evaluate(X_COLUMNS), truth(), rtol=1e-12, atol=1e-14)
    # The text form is itself a valid expression (sign() aside) that evaluates the same.
    if "sign" not in slope.text:
        again = parse_expression(slope.text, ["x", "y"])
        assert_allclose(again.evaluate(X_COLUMNS), truth(), rtol=1e-12, atol=1e-14)


def test_symbolic_derivative_against_central_differences():
    # Central difference (f(x+h) - f(x-h)) / 2h, error O(h²) (common practice), on a
    # nested expression using every function.
    text = "sin(x)*exp(-x*y) + sqrt(abs(x) + 1)*tanh(y) - log(2 + cos(x)) / (1 + tan(0.2*x)**2)"
    expression = parse_expression(text, ["x", "y"])
    slope = derivative(expression, "x").evaluate(X_COLUMNS)
    h = 1e-6
    up = expression.evaluate({"x": x_ + h, "y": y_})
    down = expression.evaluate({"x": x_ - h, "y": y_})
    assert_allclose(slope, (up - down) / (2 * h), rtol=1e-7, atol=1e-8)


# --------------------------------------------------------------------------- linearization


def test_lorenz_linearization_at_origin():
    # Lorenz (1963) at the origin: A = [[-σ, σ, 0], [ρ, -1, 0], [0, 0, -β]] from the equations;
    # the input enters dx/dt alone, B = [1, 0, 0]^T.
    result = export.linearize(lorenz_model(), [0.0, 0.0, 0.0], [0.0])
    truth = np.array([[-SIGMA, SIGMA, 0.0], [RHO, -1.0, 0.0], [0.0, 0.0, -BETA]])
    assert_allclose(result["A"], truth, rtol=0, atol=1e-10)
    assert_allclose(result["B"], [[1.0], [0.0], [0.0]], rtol=0, atol=1e-10)
    assert_allclose(result["residual"], 0.0, atol=1e-12)
    # Eigenvalues in closed form: -β and (-(σ+1) ± sqrt((σ+1)² + 4σ(ρ-1)))/2.
    root = np.sqrt((SIGMA + 1) ** 2 + 4 * SIGMA * (RHO - 1))
    expected = np.sort([-BETA, (-(SIGMA + 1) + root) / 2, (-(SIGMA + 1) - root) / 2])
    assert_allclose(np.sort(np.linalg.eigvals(result["A"]).real), expected, rtol=1e-10)


def test_lorenz_linearization_at_other_points():
    # The Jacobian of the Lorenz equations: [[-σ, σ, 0], [ρ - z, -1, -x], [y, x, -β]]; at the
    # equilibria C± = (±sqrt(β(ρ-1)), ±sqrt(β(ρ-1)), ρ-1) (Lorenz 1963) the residual vanishes.
    model = lorenz_model()
    for x, y, z in [(1.5, -2.0, 7.0), (np.sqrt(BETA * (RHO - 1)), np.sqrt(BETA * (RHO - 1)), RHO - 1)]:
        result = export.linearize(model, [x, y, z], [0.0])
        truth = np.array([[-SIGMA, SIGMA, 0.0], [RHO - z, -1.0, -x], [y, x, -BETA]])
        assert_allclose(result["A"], truth, rtol=0, atol=1e-10)
        assert_allclose(result["residual"], [SIGMA * (y - x), x * (RHO - z) - y, x * y - BETA * z], atol=1e-10)
    assert_allclose(result["residual"], 0.0, atol=1e-10)


def test_ship_linearization_at_straight_course():
    # Straight course (yaw rate 0, rudder 0) of the Nomoto-Norrbin ship:
    # A = [[0, 1], [0, -1/T]], B = [[0], [K/T]]; an equilibrium (residual 0).
    result = export.linearize(ship_model(), [10.0, 0.0], [0.0])
    assert_allclose(result["A"], [[0.0, 1.0], [0.0, -1.0 / T_SHIP]], rtol=0, atol=1e-10)
    assert_allclose(result["B"], [[0.0], [K_SHIP / T_SHIP]], rtol=0, atol=1e-10)
    assert_array_equal(result["residual"], [0.0, 0.0])


def test_ship_linearization_in_a_steady_turn():
    # Steady turn at yaw rate r0 needs rudder (r0 + a r0³)/K; there d(yaw_rate)/dt = 0 but the
    # heading keeps turning (residual r0). d/dr of the yaw equation: -(1 + 3 a r0²)/T.
    r0 = 0.8
    rudder = (r0 + A_SHIP * r0**3) / K_SHIP
    result = export.linearize(ship_model(), [0.0, r0], [rudder])
    assert_allclose(result["A"], [[0.0, 1.0], [0.0, -(1 + 3 * A_SHIP * r0**2) / T_SHIP]], rtol=0, atol=1e-10)
    assert_allclose(result["residual"], [r0, 0.0], atol=1e-12)


def test_quadratic_damping_uses_sign_for_abs():
    # d(r|r|)/dr = 2|r| (continuous, 0 at r = 0): quadratic-damping ship models (common practice).
    model = ship_model(damping="yaw_rate*abs(yaw_rate)")
    for r0 in (0.0, -0.6, 1.2):
        result = export.linearize(model, [0.0, r0], [0.0])
        assert_allclose(result["A"][1, 1], -1.0 / T_SHIP - 2 * abs(r0) * A_SHIP / T_SHIP, rtol=0, atol=1e-12)


def test_linearize_refuses_bad_operating_points():
    with pytest.raises(export.ExportError, match=r"`x_op` must have 2 values \(order \['heading', 'yaw_rate'\]\)"):
        export.linearize(ship_model(), [0.0], [0.0])
    with pytest.raises(export.ExportError, match=r"`u_op` is required: 1 numbers in the order \['rudder'\]"):
        export.linearize(ship_model(), [0.0, 0.0])
    model = discover.Model(("x",), ("u",), ("sqrt(x)", "u"), np.array([[1.0], [1.0]]))
    with pytest.raises(export.ExportError, match=r"d\(sqrt\(x\)\)/d\(x\) = 0.5 / sqrt\(x\) is not finite"):
        export.linearize(model, [0.0], [0.0])


# --------------------------------------------------------------------------- linear export


def test_rlc_linear_matrices_exact():
    # Series RLC: A = [[0, 1/C], [-1/L, -R/L]], B = [0, 1/L]^T (Kirchhoff's voltage law;
    # common practice). Exact, since every term is a state or the input.
    result = export.linear_matrices(rlc_model())
    assert_array_equal(result["A"], [[0.0, 1.0 / C_FARAD], [-1.0 / L_HENRY, -R_OHM / L_HENRY]])
    assert_array_equal(result["B"], [[0.0], [1.0 / L_HENRY]])
    assert_array_equal(result["offset"], [0.0, 0.0])
    assert result["states"] == ["v", "i"] and result["inputs"] == ["vin"]


def test_linear_matrices_take_constants_and_scaled_terms():
    # dx/dt = 2 - 3x + 0.5·(4u), dy/dt = x/2 (ours): A = [[-3, 0], [0.5, 0]], B = [[2], [0]], offset [2, 0].
    model = discover.Model(("x", "y"), ("u",), ("1", "x", "4*u", "x/2"),
                           np.array([[2.0, 0.0], [-3.0, 0.0], [0.5, 0.0], [0.0, 1.0]]))
    result = export.linear_matrices(model)
    assert_allclose(result["A"], [[-3.0, 0.0], [0.5, 0.0]])
    assert_allclose(result["B"], [[2.0], [0.0]])
    assert_allclose(result["offset"], [2.0, 0.0])


def test_linear_matrices_name_the_first_nonlinear_term():
    with pytest.raises(export.NonlinearModelError,
                       match=r"term 'yaw_rate\*\*3' of d\(yaw_rate\)/dt is not linear.*'linearize'"):
        export.linear_matrices(ship_model())


# --------------------------------------------------------------------------- LaTeX


def _balanced(text):
    depth = 0
    for match in re.finditer(r"\\[{}]|[{}]", text):
        token = match.group()
        if token in ("\\{", "\\}"):
            continue
        depth += 1 if token == "{" else -1
        if depth < 0:
            return False
    return depth == 0


@pytest.mark.parametrize("make", [lorenz_model, ship_model, function_model, pendulum_model])
def test_latex_is_structurally_sound(make):
    model = make()
    text = export.to_latex(model)
    assert text.startswith("\\begin{align*}") and text.rstrip().endswith("\\end{align*}")
    assert _balanced(text)
    assert text.count("\\left") == text.count("\\right")
    lines = [line for line in text.splitlines() if "&=" in line]
    assert len(lines) == len(model.state_names)
    for line, state in zip(lines, model.state_names):
        assert line.count("\\dot{") == 1
        assert line.startswith("\\dot{" + export.latex_name(state) + "}")
    # Every underscore escaped, except the subscript of a Greek letter (\theta_{1}).
    assert re.search(r"(?<!\\)_(?!\{)", text) is None
    assert len(re.findall(r"(?<!\\)_\{", text)) == len(re.findall(r"\\(?:theta|omega|tau)_\{", text))


def test_latex_of_the_ship_reads_as_written():
    text = export.to_latex(ship_model())
    assert "\\dot{\\mathrm{yaw\\_rate}} &= -0.05 \\, \\mathrm{yaw\\_rate} - 0.00625 \\, " \
           "\\mathrm{yaw\\_rate}^{3} + 0.005 \\, \\mathrm{rudder}" in text
    assert "\\dot{\\mathrm{heading}} &= 1 \\, \\mathrm{yaw\\_rate}" in text


@pytest.mark.skipif(shutil.which("pdflatex") is None, reason="pdflatex is not on PATH")
def test_latex_document_compiles(tmp_path):
    (tmp_path / "model.tex").write_text(export.to_latex(function_model(), document=True))
    done = subprocess.run(["pdflatex", "-interaction=nonstopmode", "-halt-on-error", "model.tex"],
                          cwd=tmp_path, capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stdout[-2000:]
    assert (tmp_path / "model.pdf").exists()


# --------------------------------------------------------------------------- writers and the command


def test_write_export_every_format(tmp_path):
    model_path = tmp_path / "model.json"
    rlc_model().save(model_path)
    written = export.write_export(model_path, "python", tmp_path / "rlc_model.py")
    module = import_fresh(written.read_text(), tmp_path, "rlc_model_written")
    assert_allclose(module.rhs(0.0, np.array([1.0, 0.5]), np.array([2.0])),
                    [0.5 / C_FARAD, (2.0 - 1.0 - R_OHM * 0.5) / L_HENRY], rtol=1e-12)
    assert "\\dot{v}" in export.write_export(model_path, "latex", tmp_path / "rlc.tex").read_text()
    linear = json.loads(export.write_export(model_path, "linear", tmp_path / "linear.json").read_text())
    assert linear["format"] == "discover-linear/1" and linear["states"] == ["v", "i"]
    assert linear["A"] == [[0.0, 1.0 / C_FARAD], [-1.0 / L_HENRY, -R_OHM / L_HENRY]]
    assert linear["B"] == [[0.0], [1.0 / L_HENRY]]
    table = pd.read_csv(export.write_export(model_path, "linear", tmp_path / "linear.csv"))
    assert list(table.columns) == ["state", "A[v]", "A[i]", "B[vin]", "offset"]
    assert table["A[i]"].tolist() == [1.0 / C_FARAD, -R_OHM / L_HENRY]
    point = json.loads(export.write_export(model_path, "linearize", tmp_path / "lin.json",
                                           x_op=[1.0, 0.0], u_op=[1.0]).read_text())
    assert point["residual"] == [0.0, 0.0] and point["x_op"] == [1.0, 0.0]
    control = json.loads(export.write_export(model_path, "control", tmp_path / "ss.json").read_text())
    assert control["C"] == [[1.0, 0.0], [0.0, 1.0]] and control["D"] == [[0.0], [0.0]]
    with pytest.raises(export.ExportError, match="export format must be one of python, latex, linear, "
                                                 "linearize, control. Got 'matlab'"):
        export.write_export(model_path, "matlab", tmp_path / "x.m")


def test_export_main_parses_operating_points(tmp_path, capsys):
    model_path = tmp_path / "model.json"
    ship_model().save(model_path)
    args = SimpleNamespace(model=str(model_path), to="linearize", out=str(tmp_path / "ship.json"),
                           x_op="0, 0", u_op="0")
    assert export.export_main(args) == 0
    assert json.loads((tmp_path / "ship.json").read_text())["B"] == [[0.0], [K_SHIP / T_SHIP]]
    args = SimpleNamespace(model=str(model_path), to="latex", out=None, x_op=None, u_op=None)
    assert export.export_main(args) == 0
    assert "\\dot{\\mathrm{heading}}" in capsys.readouterr().out
    with pytest.raises(export.ExportError, match=r"--x-op must have 2 values \(order heading, yaw_rate\)"):
        export.export_main(SimpleNamespace(model=str(model_path), to="linearize", out=None, x_op="1", u_op="0"))
    with pytest.raises(export.ExportError, match=r"--u-op must be comma-separated numbers.*Got 'left'"):
        export.export_main(SimpleNamespace(model=str(model_path), to="linearize", out=None, x_op="0,0",
                                           u_op="left"))
    with pytest.raises(export.ExportError, match=r"--to linearize needs --x-op \(order heading, yaw_rate\) "
                                                 r"and --u-op \(order rudder\)"):
        export.export_main(SimpleNamespace(model=str(model_path), to="linearize", out=None, x_op=None, u_op=None))
    with pytest.raises(discover.ModelFileError, match="model file not found"):
        export.export_main(SimpleNamespace(model=str(tmp_path / "none.json"), to="python", out=None,
                                           x_op=None, u_op=None))


def test_state_space_object_when_python_control_is_installed():
    control = pytest.importorskip("control")
    system = export.to_state_space(rlc_model())
    assert isinstance(system, control.StateSpace)
    # Poles of the series RLC: roots of s² + (R/L) s + 1/(LC) (common practice).
    expected = np.sort_complex(np.roots([1.0, R_OHM / L_HENRY, 1.0 / (L_HENRY * C_FARAD)]))
    assert_allclose(np.sort_complex(np.asarray(system.poles())), expected, rtol=1e-10)


def test_state_space_without_python_control_says_how_to_install():
    if importlib.util.find_spec("control") is not None:
        pytest.skip("python-control is installed")
    with pytest.raises(export.ExportError, match="pip install control"):
        export.to_state_space(rlc_model())


# --------------------------------------------------------------------------- error classes and exit codes


def _saved(model, tmp_path, name="model.json"):
    path = tmp_path / name
    model.save(path)
    return str(path)


def _one_error_line(capsys):
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1, err
    assert err.startswith("discover: error: ")
    return err


def test_export_arguments_have_their_own_error_class():
    # Arguments of the command (operating point, format, output path) are not model-file problems.
    assert issubclass(ExportError, DiscoverError) and not issubclass(ExportError, ModelFileError)
    assert export.ExportError is ExportError and issubclass(export.NonlinearModelError, ExportError)
    assert ExportError.exit_code == 7 and ModelFileError.exit_code == 5
    codes = [cls.exit_code for cls in DiscoverError.__subclasses__()]
    assert len(codes) == len(set(codes))  # each family its own status
    assert "7 (export arguments" in EXAMPLES  # the exit codes listed in `discover --help`


@pytest.mark.parametrize("arguments, code, message", [
    (["--to", "linearize", "--x-op=1", "--u-op=0"], 7,
     "--x-op must have 2 values (order heading, yaw_rate). Got 1"),
    (["--to", "linearize", "--x-op=0,nan", "--u-op=0"], 7,
     "--x-op must be finite numbers (no nan or inf). Got '0,nan'"),
    (["--to", "linearize", "--x-op=0,0", "--u-op=left"], 7,
     "--u-op must be comma-separated numbers in the order rudder"),
    (["--to", "linearize"], 7, "--to linearize needs --x-op (order heading, yaw_rate) and --u-op (order rudder)"),
    (["--to", "linear"], 7, "term 'yaw_rate**3' of d(yaw_rate)/dt is not linear"),
    (["--to", "control", "--out", "{tmp}/ss.csv"], 7, "the 'control' export is JSON (A, B, C, D)"),
    (["--to", "python", "--out", "{tmp}/no/such/folder/m.py"], 7, "cannot write the export"),
])
def test_export_command_exit_codes_for_bad_arguments(arguments, code, message, tmp_path, capsys):
    path = _saved(ship_model(), tmp_path)
    assert main(["export", path] + [a.format(tmp=tmp_path) for a in arguments]) == code
    assert message in _one_error_line(capsys)


def test_export_command_keeps_model_file_problems_as_such(tmp_path, capsys):
    assert main(["export", str(tmp_path / "none.json"), "--to", "python"]) == 5
    assert "model file not found" in _one_error_line(capsys)
    broken = tmp_path / "broken.json"
    broken.write_text("{ not json")
    assert main(["export", str(broken), "--to", "latex"]) == 5
    assert str(broken) in _one_error_line(capsys)


def test_export_command_succeeds_with_status_0(tmp_path, capsys):
    path = _saved(ship_model(), tmp_path)
    target = tmp_path / "s.json"
    assert main(["export", path, "--to", "linearize", "--x-op=0,0", "--u-op=0", "--out", str(target)]) == 0
    assert "Wrote the linearize export" in capsys.readouterr().out
    assert json.loads(target.read_text(encoding="utf-8"))["A"][1][1] == -1.0 / T_SHIP


# --------------------------------------------------------------------------- LaTeX names and numbers


@pytest.mark.parametrize("name, latex", [
    # Greek letter commands of LaTeX2e (the LaTeX2e unofficial reference manual, "Greek letters",
    # and the AMS Short Math Guide, "Greek letters"; from memory): lowercase alpha ... omega,
    # capitals only where they differ from Latin letters; there is no \omicron command.
    ("theta", r"\theta"), ("alpha", r"\alpha"), ("omega", r"\omega"), ("upsilon", r"\upsilon"),
    ("Gamma", r"\Gamma"), ("Omega", r"\Omega"), ("Xi", r"\Xi"),
    ("theta_1", r"\theta_{1}"), ("theta_12", r"\theta_{12}"), ("omega_m", r"\omega_{\mathrm{m}}"),
    ("phi_theta", r"\phi_{\theta}"), ("psi_ref_2", r"\psi_{\mathrm{ref\_2}}"),
    # Not Greek letter commands: stay upright text, underscores escaped as before.
    ("Alpha", r"\mathrm{Alpha}"), ("omicron", r"\mathrm{omicron}"), ("theta1", r"\mathrm{theta1}"),
    ("theta_", r"\mathrm{theta\_}"), ("thetas", r"\mathrm{thetas}"), ("yaw_rate", r"\mathrm{yaw\_rate}"),
    ("x", "x"), ("u_2", r"\mathrm{u\_2}"),
])
def test_latex_names(name, latex):
    assert export.latex_name(name) == latex


def test_latex_of_the_pendulum_uses_greek_letters():
    text = export.to_latex(pendulum_model())
    assert r"\dot{\theta} &= 1 \, \omega_{\mathrm{m}}" in text
    assert (r"\dot{\omega_{\mathrm{m}}} &= -0.5 \, \omega_{\mathrm{m}} - 9.81 \, \sin\left(\theta\right) "
            r"+ 1 \, \tau_{1}") in text
    assert "mathrm{theta}" not in text and "mathrm{omega" not in text


@pytest.mark.parametrize("coefficient", [0.123456, -12.34567, 987.654321, 3.14159265e-5, 2.718281828e7, 0.5, 42.0])
def test_latex_coefficients_have_the_digits_of_the_terminal_summary(coefficient):
    # The terminal summary (report.format_equation) is the reference for the number of digits:
    # the LaTeX shows the same rounded value, with trailing zeros where it was rounded.
    terminal = format_equation("x", [("x", coefficient, {})])
    printed = re.fullmatch(r"d\(x\)/dt = (-?[0-9.e+-]+)·x", terminal).group(1)
    model = discover.Model(("x",), (), ("x",), np.array([[coefficient]]))
    latex = re.search(r"&= (.*) \\, x", export.to_latex(model)).group(1)
    mantissa, _, exponent = latex.partition(r" \times 10^")
    assert float(mantissa + ("e" + exponent.strip("{}") if exponent else "")) == float(printed)
    if float(printed) != coefficient:  # rounded: as many significant digits as the terminal shows
        digits = len(mantissa.lstrip("-").replace(".", "").lstrip("0"))
        assert digits == export.LATEX_DIGITS


@pytest.mark.parametrize("value, latex", [
    # A printed "1" means exactly 1; a rounded 1 shows its digits (our choice, see latex_number).
    (1.0004, "1.000"), (1.0, "1"), (0.99996, "1.000"), (0.05, "0.05"), (0.050001, "0.05000"),
    (2.5e-7, r"2.5 \times 10^{-7}"), (1.00004e-7, r"1.000 \times 10^{-7}"), (-3.0, "-3"),
])
def test_latex_numbers_show_rounding(value, latex):
    assert export.latex_number(value) == latex


def test_latex_coefficient_near_one_reads_as_rounded():
    model = discover.Model(("omega",), (), ("omega", "1"), np.array([[1.0004], [-1.0]]))
    assert r"\dot{\omega} &= 1.000 \, \omega - 1" in export.to_latex(model)


# --------------------------------------------------------------------------- UTF-8 JSON, finite numbers


def test_json_exports_are_utf8_without_escapes(tmp_path):
    model = discover.Model(("θ", "omega"), ("τ",), ("omega", "θ", "τ"),
                           np.array([[1.0, 0.0], [0.0, -2.0], [0.0, 1.0]]))
    path = _saved(model, tmp_path)
    for fmt, extra in [("linearize", ["--x-op=0,0", "--u-op=0"]), ("linear", []), ("control", [])]:
        target = tmp_path / f"{fmt}.json"
        assert main(["export", path, "--to", fmt, "--out", str(target)] + extra) == 0
        raw = target.read_bytes()
        assert b"\\u" not in raw  # no \uXXXX escapes (json.dumps' ensure_ascii default)
        document = json.loads(raw.decode("utf-8"))
        assert document["states"] == ["θ", "omega"] and document["inputs"] == ["τ"]
        assert '"θ"'.encode() in raw
    assert "≈".encode() in (tmp_path / "linearize.json").read_bytes()
    table = tmp_path / "linear.csv"
    assert main(["export", path, "--to", "linear", "--out", str(table)]) == 0
    assert list(pd.read_csv(table, encoding="utf-8").columns) == ["state", "A[θ]", "A[omega]", "B[τ]", "offset"]


def test_export_to_an_ascii_console_falls_back_to_utf8_bytes(tmp_path, monkeypatch):
    path = _saved(ship_model(), tmp_path)
    console = io.TextIOWrapper(io.BytesIO(), encoding="ascii")
    monkeypatch.setattr("sys.stdout", console)
    args = SimpleNamespace(model=path, to="linearize", out=None, x_op="0, 0", u_op="0")
    assert export.export_main(args) == 0
    console.flush()
    assert json.loads(console.buffer.getvalue().decode("utf-8"))["equation"].startswith("dx/dt ≈ residual")


def overflow_model():
    # 1e308 and 2·1e308 add up past the largest float64, about 1.798e308 (IEEE 754 binary64).
    return discover.Model(("x", "y"), ("u",), ("x", "2*x", "u"), np.array([[1e308, 0.0], [1e308, 0.0], [0.0, 1.0]]))


@pytest.mark.filterwarnings("error::RuntimeWarning")  # one line of ours, no numpy overflow warning
@pytest.mark.parametrize("out", [None, "m.json", "m.csv"])
def test_linear_export_refuses_non_finite_matrices(out, tmp_path, capsys):
    path = _saved(overflow_model(), tmp_path)
    extra = ["--out", str(tmp_path / out)] if out else []
    assert main(["export", path, "--to", "linear"] + extra) == 5  # the model's coefficients
    err = _one_error_line(capsys)
    assert "the linear export has A[x, x] = inf in the equation of d(x)/dt; JSON holds only finite numbers" in err
    assert out is None or not (tmp_path / out).exists()


@pytest.mark.filterwarnings("error::RuntimeWarning")
def test_linearize_refuses_non_finite_residual_at_the_operating_point(tmp_path, capsys):
    # d(x**2)/dx = 2x is finite at x = 1e5, the residual 1e300 · 1e10 is not.
    model = discover.Model(("x",), ("u",), ("x**2", "u"), np.array([[1e300], [1.0]]))
    path = _saved(model, tmp_path)
    target = tmp_path / "l.json"
    assert main(["export", path, "--to", "linearize", "--x-op=1e5", "--u-op=0", "--out", str(target)]) == 7
    assert ("the linearize export has residual[x] = inf in the equation of d(x)/dt at the operating point "
            "{'x': 100000.0, 'u': 0.0}; JSON holds only finite numbers. Choose an operating point"
            ) in _one_error_line(capsys)
    assert not target.exists()
    assert main(["export", path, "--to", "control", "--x-op=1e155", "--u-op=0"]) == 7
    assert "the control export has A[x, x] = inf" in _one_error_line(capsys)
    with pytest.raises(ExportError, match=r"B\[x, u\] = nan .*\(and 1 more non-finite entries\)"):
        export._refuse_non_finite({"states": ["x"], "inputs": ["u"], "A": np.zeros((1, 1)),
                                   "B": np.array([[np.nan]]), "residual": np.array([np.inf]),
                                   "x_op": np.zeros(1), "u_op": np.zeros(1)}, "linearize")
