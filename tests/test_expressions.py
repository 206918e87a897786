"""Coefficient expressions: text in math notation -> vectorised NumPy callable.

Specification of ``galerkit.bindings.command.expressions``: values agree with direct
NumPy evaluation, constants broadcast, every refused construct raises
``InputError`` with a caret under the offending character, and random text
never raises anything but ``InputError``.
"""

from __future__ import annotations

import ast
import builtins
import doctest
import math
import pickle

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from galerkit.bindings.command import expressions
from galerkit.bindings.command.expressions import (
    FUNCTION_NAMES,
    MAX_DEPTH,
    MAX_LENGTH,
    MAX_NODES,
    Expression,
    compile_expression,
)
from galerkit.errors import InputError

RTOL = 1e-13
ATOL = 1e-13


@pytest.fixture(scope="module")
def points():
    """Random points in [-2, 2]^3 (none exactly on 0), shape (3, 64)."""
    rng = np.random.default_rng(20240611)
    return rng.uniform(-2.0, 2.0, size=(3, 64))


def caret_column(message: str, text: str) -> int:
    """Column (from 0, within ``text``) of the caret in a one-line message block."""
    lines = message.splitlines()
    shown, caret = lines[1], lines[2]
    assert caret.strip() == "^", message
    return caret.index("^") - shown.index(text)


def first_node(text: str, node_type: type) -> ast.AST:
    """The first node of ``node_type`` in Python's own parse of ``text``."""
    for node in ast.walk(ast.parse(text, mode="eval")):
        if isinstance(node, node_type):
            return node
    raise AssertionError(f"no {node_type.__name__} in {text!r}")


# ---------------------------------------------------------------------------
# values (reference: NumPy, evaluating the same formula directly)
# ---------------------------------------------------------------------------

VALUE_CASES = [
    ("x + 2*y - z/4", lambda x, y, z: x + 2 * y - z / 4),
    ("x - y - z", lambda x, y, z: (x - y) - z),
    ("x / y / z", lambda x, y, z: (x / y) / z),
    ("x^2 + y**3", lambda x, y, z: x**2 + y**3),
    # reference: Python language reference, power is right-associative and
    # binds tighter than a unary minus on its left; ^ follows **.
    ("2^3^2", lambda x, y, z: np.full_like(x, 2.0**9)),
    ("-x^2", lambda x, y, z: -(x**2)),
    ("(-x)^2", lambda x, y, z: x**2),
    ("2^-1 * x", lambda x, y, z: 0.5 * x),
    ("x^2*y", lambda x, y, z: (x**2) * y),
    ("abs(x)^abs(y)^0.5", lambda x, y, z: np.abs(x) ** (np.abs(y) ** 0.5)),
    ("sin(pi*x)*cos(pi*y)*exp(-z)", lambda x, y, z: np.sin(np.pi * x) * np.cos(np.pi * y) * np.exp(-z)),
    ("sqrt(abs(x)) + log(1 + x^2) + log10(2 + y^2)",
     lambda x, y, z: np.sqrt(np.abs(x)) + np.log(1 + x**2) + np.log10(2 + y**2)),
    ("tanh(x) + sinh(y) - cosh(z/2) + tan(x/2)",
     lambda x, y, z: np.tanh(x) + np.sinh(y) - np.cosh(z / 2) + np.tan(x / 2)),
    ("atan2(y, x) + atan(x) + asin(x/3) + acos(y/3)",
     lambda x, y, z: np.arctan2(y, x) + np.arctan(x) + np.arcsin(x / 3) + np.arccos(y / 3)),
    ("floor(x) + ceil(y)", lambda x, y, z: np.floor(x) + np.ceil(y)),
    ("min(x, y) + max(x, y, z, 0.5)",
     lambda x, y, z: np.minimum(x, y) + np.maximum(np.maximum(np.maximum(x, y), z), 0.5)),
    ("1 if x > 0 else -1", lambda x, y, z: np.where(x > 0, 1.0, -1.0)),
    ("x if x > y else (y if y > z else z)",
     lambda x, y, z: np.where(x > y, x, np.where(y > z, y, z))),
    ("0 < x < 1", lambda x, y, z: ((0 < x) & (x < 1)).astype(float)),
    ("-1 <= x < y <= 1", lambda x, y, z: ((-1 <= x) & (x < y) & (y <= 1)).astype(float)),
    ("(x > 0) + (y <= 0) + (z == z) + (x != y) + (x >= y) + (y < z)",
     lambda x, y, z: (x > 0) * 1.0 + (y <= 0) + (z == z) + (x != y) + (x >= y) + (y < z)),
    ("(x > 0) - (y > 0)", lambda x, y, z: (x > 0) * 1.0 - (y > 0) * 1.0),
    ("x > 0 and y > 0 or not z > 0",
     lambda x, y, z: (((x > 0) & (y > 0)) | ~(z > 0)).astype(float)),
    ("x and y", lambda x, y, z: ((x != 0) & (y != 0)).astype(float)),
    ("e^x - exp(x) + pi", lambda x, y, z: np.e**x - np.exp(x) + np.pi),
    ("1e-3*x + .5 + 0x10", lambda x, y, z: 1e-3 * x + 0.5 + 16.0),
    ("+x - -y", lambda x, y, z: x + y),
    ("(x\n + y)", lambda x, y, z: x + y),
    ("   x * y", lambda x, y, z: x * y),
]


@pytest.mark.parametrize("text, reference", VALUE_CASES, ids=[c[0] for c in VALUE_CASES])
def test_values_match_direct_numpy_evaluation(text, reference, points):
    # reference: NumPy
    x, y, z = points
    got = compile_expression(text)(points)
    with np.errstate(all="ignore"):
        want = np.broadcast_to(reference(x, y, z), x.shape)
    assert got.dtype == np.float64 and got.shape == x.shape
    np.testing.assert_allclose(got, want, rtol=RTOL, atol=ATOL)


def test_caret_power_has_the_precedence_of_double_star(points):
    # reference: Python language reference (power operator); ^ is read as **
    for caret, stars in [("2^3^2", "2**3**2"), ("-x^2", "-x**2"), ("abs(x)^-y", "abs(x)**-y"),
                         ("2*x^3/y", "2*x**3/y"), ("-2^-2", "-2**-2")]:
        a = compile_expression(caret)(points)
        b = compile_expression(stars)(points)
        np.testing.assert_array_equal(a, b)
    assert compile_expression("2^3^2").value == 512.0
    assert compile_expression("-2^2").value == -4.0


def test_user_constants_and_builtin_constants(points):
    # reference: NumPy (np.pi, np.e); common practice for named parameters
    x, y, _ = points
    f = compile_expression("k0*x + c^2 - pi*e", dim=2, constants={"k0": 2.5, "c": 3})
    np.testing.assert_allclose(f(points[:2]), 2.5 * x + 9.0 - np.pi * np.e, rtol=RTOL, atol=ATOL)
    assert f.variables == {"x"}
    assert compile_expression("pi").value == pytest.approx(math.pi, rel=0, abs=0)
    assert compile_expression("e").value == pytest.approx(math.e, rel=0, abs=0)


def test_unselected_branch_may_be_undefined(points):
    # Both branches are computed; a NaN where the other branch is chosen is discarded.
    x = points[0]
    got = compile_expression("log(x) if x > 0 else 0", dim=None)(points)
    with np.errstate(all="ignore"):
        want = np.where(x > 0, np.log(x), 0.0)
    np.testing.assert_allclose(got, want, rtol=RTOL, atol=ATOL)


def test_long_flat_sum_is_one_nesting_level(points):
    n_terms = 200  # 399 parts: under MAX_NODES, and a chain counts as one level
    f = compile_expression("+".join(["x"] * n_terms))
    np.testing.assert_allclose(f(points), n_terms * points[0], rtol=1e-12, atol=1e-12)


# ---------------------------------------------------------------------------
# constants and attributes
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("text, value", [("3.5", 3.5), ("2*pi", 2 * math.pi), (7, 7.0),
                                         (2.5, 2.5), ("-2^2", -4.0), ("max(1, 2, 3)", 3.0),
                                         ("1 if 2 > 1 else 0", 1.0)])
def test_constant_expressions_broadcast_to_every_point(text, value):
    f = compile_expression(text, dim=2)
    assert f.is_constant and f.variables == set()
    assert isinstance(f.value, float) and f.value == pytest.approx(value, rel=1e-15)
    out = f(np.zeros((2, 5)))
    assert out.shape == (5,) and out.dtype == np.float64
    np.testing.assert_allclose(out, value, rtol=1e-15)
    assert f(np.zeros((2, 0))).shape == (0,)


def test_attributes_and_repr():
    f = compile_expression("x*y + 1", dim=3, name="conductivity")
    assert f.text == "x*y + 1"
    assert f.variables == {"x", "y"}
    assert f.is_constant is False and f.value is None
    assert f.dim == 3 and f.name == "conductivity"
    assert isinstance(f, Expression)
    assert "x*y + 1" in repr(f)


def test_result_is_a_new_array_not_a_view_of_the_points():
    pts = np.array([[1.0, 2.0, 3.0]])
    out = compile_expression("x")(pts)
    out[:] = -1.0
    np.testing.assert_array_equal(pts, [[1.0, 2.0, 3.0]])


def test_accepts_lists_and_integer_arrays():
    f = compile_expression("x + y", dim=2)
    np.testing.assert_array_equal(f([[1, 2], [3, 4]]), [4.0, 6.0])
    np.testing.assert_array_equal(f(np.array([[1, 2], [3, 4]], dtype=np.int32)), [4.0, 6.0])


def test_pickle_round_trip(points):
    f = compile_expression("k*sin(x) + y", name="source", constants={"k": 2.0})
    g = pickle.loads(pickle.dumps(f))
    np.testing.assert_array_equal(f(points), g(points))
    assert g.name == "source" and g.text == f.text


def test_no_eval_or_exec_is_used(monkeypatch, points):
    def refuse(*args, **kwargs):
        raise AssertionError("eval/exec must not be used")

    monkeypatch.setattr(builtins, "eval", refuse)
    monkeypatch.setattr(builtins, "exec", refuse)
    f = compile_expression("sin(x)^2 + cos(x)^2")
    # reference: the identity sin^2 + cos^2 = 1
    np.testing.assert_allclose(f(points), 1.0, rtol=1e-14)


def test_docstring_examples_run():
    result = doctest.testmod(expressions, optionflags=doctest.ELLIPSIS)
    assert result.attempted > 0
    assert result.failed == 0


def test_every_function_is_in_the_documented_table():
    doc = expressions.__doc__
    for fname in FUNCTION_NAMES:
        assert f"``{fname}``" in doc


# ---------------------------------------------------------------------------
# refused constructs: InputError with a caret at the offending node
# ---------------------------------------------------------------------------

NODE_CASES = [
    ("__import__('os')", ast.Call, "'__import__' is not allowed"),
    ("1 + open('f')", ast.Call, "'open' is not allowed"),
    ("x.real", ast.Attribute, "attribute"),
    ("2 * x.real", ast.Attribute, "attribute"),
    ("().__class__.__bases__", ast.Attribute, "attribute"),
    ("lambda: 1", ast.Lambda, "lambda"),
    ("1 + (lambda: 1)", ast.Lambda, "lambda"),
    ("[i for i in x]", ast.ListComp, "comprehension"),
    ("1 + [i for i in x]", ast.ListComp, "comprehension"),
    ("x[0]", ast.Subscript, "indexing"),
    ("y + x[0]", ast.Subscript, "indexing"),
    ("'abc'", ast.Constant, "string"),
    ("x + 'abc'", ast.Constant, "string"),
    ("x + b'abc'", ast.Constant, "string"),
    ("f'{x}'", ast.JoinedStr, "f-string"),
    ("sin(x, k=2)", ast.keyword, "keyword"),
    ("max(*x)", ast.Starred, "starred"),
    ("1j", ast.Constant, "complex"),
    ("x + 2j", ast.Constant, "complex"),
    ("x + True", ast.Constant, "'True'"),
    ("None", ast.Constant, "'None'"),
    ("(x, y)", ast.Tuple, "tuple"),
    ("{1: 2}", ast.Dict, "dictionar"),
    ("np.sin(x)", ast.Attribute, "attribute"),
    ("x(2)", ast.Call, "not a function"),
    ("1 + ~x", ast.UnaryOp, "'~'"),
]


@pytest.mark.parametrize("text, node_type, phrase", NODE_CASES, ids=[c[0] for c in NODE_CASES])
def test_refused_construct_points_at_its_node(text, node_type, phrase):
    # reference: Python's own parser (ast) gives the node's column
    with pytest.raises(InputError) as info:
        compile_expression(text, name="source")
    msg = str(info.value)
    assert msg.startswith("source: ")
    assert phrase in msg.splitlines()[0]
    assert caret_column(msg, text) == first_node(text, node_type).col_offset


TOKEN_CASES = [
    ("y := 2", ":=", "':='"),
    ("(y := 2)", ":=", "':='"),
    ("x; y", ";", "';'"),
    ("x = 1", "=", "'='"),
    ("x # note", "#", "comment"),
    ("1 + x % 2", "%", "'%'"),
    ("x // 2", "//", "'//'"),
    ("x @ y", "@", "'@'"),
    ("x & y", "&", "'&'"),
    ("(x) | y", "|", "'|'"),
    ("x << 1", "<<", "'<<'"),
    ("x is y", "is", "'is'"),
    ("x in y", "in", "'in'"),
    ("3 \u00d7 x", "\u00d7", "not allowed"),
]


@pytest.mark.parametrize("text, symbol, phrase", TOKEN_CASES, ids=[c[0] for c in TOKEN_CASES])
def test_refused_operator_or_token_points_at_it(text, symbol, phrase):
    with pytest.raises(InputError) as info:
        compile_expression(text, name="source")
    msg = str(info.value)
    assert phrase in msg.splitlines()[0]
    assert caret_column(msg, text) == text.index(symbol)


def test_message_layout_what_text_caret_todo():
    with pytest.raises(InputError) as info:
        compile_expression("sin(x) + foo", name="conductivity")
    lines = str(info.value).splitlines()
    assert lines[0].startswith("conductivity: unknown name 'foo'")
    assert lines[1].strip() == "sin(x) + foo"
    assert lines[2].strip() == "^"
    assert caret_column(str(info.value), "sin(x) + foo") == 9
    assert any("allowed names" in line for line in lines[3:])


def test_unknown_name_lists_allowed_names_and_functions():
    with pytest.raises(InputError) as info:
        compile_expression("foo + 1", dim=2, constants={"k0": 1.0})
    msg = str(info.value)
    line = [ln for ln in msg.splitlines() if ln.startswith("allowed names: ")][0]
    names_part, functions_part = line.split("; ")
    names = set(names_part.removeprefix("allowed names: ").split(", "))
    functions = functions_part.removeprefix("allowed functions: ").split(", ")
    assert names == {"x", "y", "pi", "e", "k0"}  # no z in dimension 2
    assert functions == list(FUNCTION_NAMES)


@pytest.mark.parametrize("text, hint", [("t*x", "not a variable"), ("Sin(x)", "'sin'"),
                                        ("PI*x", "'pi'"), ("ln(x)", "log"), ("sin", "sin(...)")])
def test_helpful_hints_for_common_mistakes(text, hint):
    with pytest.raises(InputError) as info:
        compile_expression(text)
    assert hint in str(info.value)


def test_z_refused_in_two_dimensions_and_y_in_one():
    with pytest.raises(InputError) as info:
        compile_expression("x + z", dim=2, name="source")
    msg = str(info.value)
    assert "'z'" in msg.splitlines()[0] and "dimension 2" in msg.splitlines()[0]
    assert caret_column(msg, "x + z") == 4
    with pytest.raises(InputError):
        compile_expression("y", dim=1)
    assert compile_expression("x + z").variables == {"x", "z"}  # dim None: any


def test_positions_refer_to_the_text_as_written():
    # ^ is rewritten to ** and leading blanks are dropped before parsing; the
    # caret must still sit under the character the user typed.
    for text in ["x^2 + foo", "x^2^2 + foo", "   x^2 + foo", "2^x^(1) + foo"]:
        with pytest.raises(InputError) as info:
            compile_expression(text)
        assert caret_column(str(info.value), text) == text.index("foo")


def test_multi_line_text_shows_the_offending_line():
    with pytest.raises(InputError) as info:
        compile_expression("(x\n + foo)")
    lines = str(info.value).splitlines()
    assert "line 2" in lines[0]
    assert lines[1].strip() == "+ foo)"
    assert lines[2].index("^") - lines[1].index(" + foo)") == 3


@pytest.mark.parametrize("text", ["1 +", "sin(x", "2x", "x ^^ 2", "x\n+1", "x ^= 2", "'abc",
                                  ")", "x y", "if x", "import os"])
def test_syntax_errors_are_input_errors(text):
    with pytest.raises(InputError) as info:
        compile_expression(text, name="source")
    assert str(info.value).startswith("source: ")


@pytest.mark.parametrize("text", ["", "   ", "\n\t"])
def test_empty_text_refused(text):
    with pytest.raises(InputError, match="empty"):
        compile_expression(text)


def test_control_characters_refused():
    with pytest.raises(InputError, match="control character"):
        compile_expression("x\x00")


# ---------------------------------------------------------------------------
# limits
# ---------------------------------------------------------------------------


def test_length_limit():
    with pytest.raises(InputError) as info:
        compile_expression("x+" * 2499 + "x")  # 5000 characters
    assert str(MAX_LENGTH) in str(info.value).splitlines()[0]
    assert compile_expression("x" + " " * (MAX_LENGTH - 1)).variables == {"x"}
    with pytest.raises(InputError, match=str(MAX_LENGTH)):
        compile_expression("x" + " " * MAX_LENGTH)


def test_deep_bracket_nesting_refused():
    with pytest.raises(InputError) as info:
        compile_expression("(" * 200 + "x" + ")" * 200)
    assert str(MAX_DEPTH) in str(info.value).splitlines()[0]
    ok = "(" * MAX_DEPTH + "x" + ")" * MAX_DEPTH
    assert compile_expression(ok).variables == {"x"}
    with pytest.raises(InputError, match=str(MAX_DEPTH)):
        compile_expression("(" + ok + ")")


@pytest.mark.parametrize("text", ["-" * 60 + "x", "sin(" * 60 + "x" + ")" * 60,
                                  "not " * 60 + "x", "x^" * 60 + "x"])
def test_deep_operator_nesting_refused(text):
    with pytest.raises(InputError, match=f"deeper than {MAX_DEPTH}"):
        compile_expression(text)


def test_node_count_limit():
    with pytest.raises(InputError) as info:
        compile_expression("+".join(["x"] * 300))  # 599 parts
    assert str(MAX_NODES) in str(info.value).splitlines()[0]


def test_number_too_large_refused():
    with pytest.raises(InputError, match="too large"):
        compile_expression("1e999 * x")
    with pytest.raises(InputError, match="too large"):
        compile_expression("9" * 400)


# ---------------------------------------------------------------------------
# evaluation errors
# ---------------------------------------------------------------------------


def test_log_of_non_positive_names_the_first_point():
    f = compile_expression("log(x)", dim=1, name="source")
    with pytest.raises(InputError) as info:
        f(np.array([[1.0, 0.0, -1.0]]))
    first = str(info.value).splitlines()[0]
    assert first.startswith("source: ")
    assert "2 of 3 points" in first and "point 1" in first and "x=0.0" in first
    assert str(info.value).splitlines()[1].strip() == "log(x)"


def test_division_by_zero_names_the_point():
    f = compile_expression("1/x + y", dim=2, name="conductivity")
    with pytest.raises(InputError) as info:
        f(np.array([[2.0, 4.0, 0.0], [1.0, 1.0, 0.5]]))
    first = str(info.value).splitlines()[0]
    assert "point 2" in first and "x=0.0" in first and "y=0.5" in first and "inf" in first


@pytest.mark.parametrize("text", ["log(-1)", "1/0", "sqrt(-1)", "exp(1000)", "0/0"])
def test_constant_non_finite_refused_at_compile_time(text):
    with pytest.raises(InputError, match="evaluates to"):
        compile_expression(text)


def test_overflow_at_a_point_refused():
    with pytest.raises(InputError, match="not finite"):
        compile_expression("exp(x)")(np.array([[1.0, 1000.0]]))


@pytest.mark.parametrize(
    "pts, phrase",
    [
        (np.zeros(3), "2-D"),
        (np.zeros((4, 3)), "1, 2 or 3 rows"),
        (np.zeros((3, 3)), "must have 2 rows"),
        (np.zeros((2, 3), dtype=complex), "real numbers"),
        (np.array([[0.0, np.nan], [0.0, 0.0]]), "non-finite coordinate at point 1"),
        ([[1.0], [1.0, 2.0]], "cannot be read"),
        ("abc", "real numbers"),
    ],
)
def test_bad_points_refused(pts, phrase):
    f = compile_expression("x + y", dim=2, name="source")
    with pytest.raises(InputError) as info:
        f(pts)
    assert phrase in str(info.value) and str(info.value).startswith("source: ")


def test_too_few_rows_for_the_coordinates_used():
    f = compile_expression("x + z")
    with pytest.raises(InputError, match="at least 3 rows"):
        f(np.zeros((2, 4)))
    assert f(np.zeros((3, 4))).shape == (4,)


# ---------------------------------------------------------------------------
# arguments
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("constants, phrase", [
    ({"x": 1.0}, "coordinate"),
    ({"sin": 1.0}, "function"),
    ({"pi": 3.0}, "built-in"),
    ({"2a": 1.0}, "valid name"),
    ({"lambda": 1.0}, "valid name"),
    ({"k": "1"}, "real number"),
    ({"k": True}, "real number"),
    ({"k": float("nan")}, "not finite"),
    ([("k", 1.0)], "mapping"),
])
def test_bad_constants_refused(constants, phrase):
    with pytest.raises(InputError, match=phrase):
        compile_expression("x", constants=constants)


@pytest.mark.parametrize("dim", [0, 4, 2.0, True, "2"])
def test_bad_dim_refused(dim):
    with pytest.raises(InputError, match="dim"):
        compile_expression("x", dim=dim)


@pytest.mark.parametrize("text", [None, [1], True, float("nan"), float("inf")])
def test_bad_text_type_refused(text):
    with pytest.raises(InputError):
        compile_expression(text)


def test_input_error_is_a_value_error():
    with pytest.raises(ValueError):
        compile_expression("x.real")


# ---------------------------------------------------------------------------
# robustness: random text raises InputError or nothing
# ---------------------------------------------------------------------------

_ALPHABET = (
    "abcdefghijklmnopqrstuvwxyzXYZ_0123456789"
    "+-*/^%()[]{}<>=!.,:;'\"#@&|~ \t\n\\j\u03c0\u00d7"
)
_PIECES = ["x", "y", "z", "pi", "e", "k", "1", "2.5", "0", "1e3", "+", "-", "*", "/", "^",
           "**", "(", ")", "sin(", "log(", "max(", "min(", "sqrt(", ",", "<", "==",
           " if ", " else ", " and ", " or ", "not ", ".", "[", "]", "'", "_", "t"]


def _combine(children):
    unary = st.tuples(st.sampled_from(["-", "+", "not ", "sin", "exp", "abs", "sqrt", "log"]),
                      children).map(lambda t: f"{t[0]}({t[1]})")
    binary = st.tuples(children, st.sampled_from(["+", "-", "*", "/", "^", "**", "<", ">=",
                                                  "==", " and ", " or "]), children
                       ).map(lambda t: f"({t[0]}{t[1]}{t[2]})")
    pair = st.tuples(st.sampled_from(["min", "max", "atan2"]), children, children
                     ).map(lambda t: f"{t[0]}({t[1]}, {t[2]})")
    choice = st.tuples(children, children, children).map(
        lambda t: f"({t[0]} if {t[1]} else {t[2]})")
    return st.one_of(unary, binary, pair, choice)


well_formed = st.recursive(
    st.sampled_from(["x", "y", "z", "pi", "e", "k", "1", "2.5", "0", "1e-3"]), _combine,
    max_leaves=12,
)

random_text = st.one_of(
    st.text(alphabet=_ALPHABET, max_size=30),
    st.lists(st.sampled_from(_PIECES), max_size=14).map("".join),
    well_formed,
)


@settings(max_examples=300, deadline=None)
@given(text=random_text, dim=st.sampled_from([None, 1, 2, 3]))
def test_random_text_compiles_or_raises_input_error(text, dim):
    rows = 3 if dim is None else dim
    pts = np.linspace(-1.5, 1.5, 7 * rows).reshape(rows, 7)
    try:
        f = compile_expression(text, dim=dim, name="fuzz", constants={"k": 0.5})
    except InputError as err:
        assert str(err).startswith("fuzz: ")
        return
    try:
        out = f(pts)
    except InputError as err:
        assert str(err).startswith("fuzz: ")
        return
    assert isinstance(out, np.ndarray) and out.dtype == np.float64 and out.shape == (7,)
    assert np.isfinite(out).all()


@settings(max_examples=200, deadline=None)
@given(text=well_formed)
def test_caret_and_double_star_agree_on_random_formulas(text):
    # ^ is documented as another spelling of **, with the same precedence.
    pts = np.linspace(0.1, 1.9, 21).reshape(3, 7)
    results = []
    for spelling in (text.replace("**", "^"), text.replace("^", "**")):
        try:
            results.append(compile_expression(spelling, constants={"k": 0.5})(pts))
        except InputError as err:
            results.append(str(err).splitlines()[0].split(" at ")[0])
    if isinstance(results[0], np.ndarray) and isinstance(results[1], np.ndarray):
        np.testing.assert_array_equal(results[0], results[1])
    else:
        assert type(results[0]) is type(results[1])
