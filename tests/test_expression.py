"""Tests for designcalc.expression: the whitelisted arithmetic-expression compiler."""

from __future__ import annotations

import doctest
import math
import pickle
import warnings
from collections.abc import Callable, Mapping
from typing import NamedTuple

import numpy as np
import pytest
from hypothesis import assume, example, given, settings
from hypothesis import strategies as st

import designcalc.expression as expression_module
from designcalc.errors import ExpressionError
from designcalc.expression import (
    FUNCTIONS,
    MAX_DEPTH,
    MAX_LENGTH,
    MAX_NODES,
    Expression,
    compile_expression,
)

UV = ("u", "v")


def _arrays(seed: int, size: int = 50) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    return rng.uniform(0.0, 1.0, size), rng.normal(0.0, 2.0, size)


# -- values ---------------------------------------------------------------------

# Each formula is written in numpy with the same operations in the same order, so the
# results must be bit-identical: no tolerance is needed.
FORMULAS: list[tuple[str, Callable[[np.ndarray, np.ndarray], np.ndarray]]] = [
    (
        "1 + 0.7*cos(2*pi*u)*cos(2*pi*v)",
        lambda u, v: 1 + 0.7 * np.cos(2 * np.pi * u) * np.cos(2 * np.pi * v),
    ),
    ("exp(-(u - v)**2 / 0.1)", lambda u, v: np.exp(-((u - v) ** 2) / 0.1)),
    ("2*u - 1", lambda u, v: 2 * u - 1),
    (
        "sqrt(abs(v)) + log1p(u) - expm1(-u)",
        lambda u, v: np.sqrt(np.abs(v)) + np.log1p(u) - np.expm1(-u),
    ),
    (
        "tanh(v) * arctan(u) / (1 + tan(u))",
        lambda u, v: np.tanh(v) * np.arctan(u) / (1 + np.tan(u)),
    ),
    (
        "minimum(u, v) + maximum(u, v)**2",
        lambda u, v: np.minimum(u, v) + np.maximum(u, v) ** 2,
    ),
    (
        "clip(v, 0, 1) * sin(u)",
        lambda u, v: np.minimum(np.maximum(v, 0.0), 1.0) * np.sin(u),
    ),
    ("e**u * log(u + 1)", lambda u, v: np.e**u * np.log(u + 1)),
    ("u**2.5 + 3", lambda u, v: u**2.5 + 3),
]


@pytest.mark.parametrize(
    ("text", "formula"), FORMULAS, ids=[text for text, _ in FORMULAS]
)
def test_values_equal_the_numpy_formula(text: str, formula: Callable) -> None:
    """An expression evaluates exactly as the same formula written in numpy."""
    u, v = _arrays(seed=20240601)
    result = compile_expression(text, variables=UV)(u=u, v=v)
    assert result.dtype == np.float64
    np.testing.assert_array_equal(result, formula(u, v))


def test_product_of_two_variables_is_elementwise() -> None:
    """compile_expression("u*v")(u=a, v=b) is a*b, and swapping the inputs swaps the roles."""
    a, b = _arrays(seed=7)
    product = compile_expression("u*v", variables=UV)
    np.testing.assert_array_equal(product(u=a, v=b), a * b)
    np.testing.assert_array_equal(product(u=b, v=a), b * a)


def test_inputs_broadcast_to_a_grid() -> None:
    """A column of u and a row of v give the full kernel matrix."""
    grid = np.linspace(0.0, 1.0, 6)
    kernel = compile_expression("u + 10*v", variables=UV)
    np.testing.assert_array_equal(
        kernel(u=grid[:, None], v=grid[None, :]), grid[:, None] + 10 * grid[None, :]
    )


def test_constant_expression_broadcasts_to_the_input_shape() -> None:
    """An expression without variables fills the inputs' broadcast shape."""
    result = compile_expression("2*pi", variables=UV)(
        u=np.zeros((3, 1)), v=np.zeros((1, 4))
    )
    assert result.shape == (3, 4)
    np.testing.assert_array_equal(result, np.full((3, 4), 2 * math.pi))


def test_unused_variable_still_sets_the_shape() -> None:
    """A kernel that ignores v still returns the (u, v) broadcast shape."""
    result = compile_expression("1 + u", variables=UV)(
        u=np.arange(3.0), v=np.zeros((2, 1))
    )
    np.testing.assert_array_equal(result, np.broadcast_to(1 + np.arange(3.0), (2, 3)))


def test_result_is_a_fresh_float64_array() -> None:
    """The identity expression returns a new float64 array, never the caller's input."""
    u = np.array([1, 2, 3])
    result = compile_expression("u", variables=("u",))(u=u)
    assert result.dtype == np.float64
    result[0] = 99.0
    assert u[0] == 1
    floats = np.array([0.5, 0.25])
    assert compile_expression("u", variables=("u",))(u=floats) is not floats


def test_scalar_inputs_give_a_zero_dimensional_array() -> None:
    """Python floats are accepted and give a 0-d float64 array."""
    result = compile_expression("u*v", variables=UV)(u=2.0, v=3.0)
    assert result.shape == ()
    assert result == 6.0


@pytest.mark.parametrize(
    ("text", "u", "expected"),
    [
        ("-u**2", 3.0, -9.0),  # unary minus binds looser than **, as in Python
        ("(-u)**2", 3.0, 9.0),
        ("2**3**2", 0.0, 512.0),  # ** is right-associative
        ("u - 1 - 1", 5.0, 3.0),  # - is left-associative
        ("u / 2 / 5", 20.0, 2.0),
        ("1 + 2*u**2", 3.0, 19.0),
        ("2**-u", 1.0, 0.5),  # a unary operand on the right of **
        ("u*-2", 3.0, -6.0),
        ("- -u", 4.0, 4.0),
        ("+u", 4.0, 4.0),
        ("-2**2", 0.0, -4.0),
        ("((((u))))", 7.0, 7.0),
    ],
)
def test_operator_precedence_follows_python(
    text: str, u: float, expected: float
) -> None:
    """Precedence and associativity are Python's."""
    assert compile_expression(text, variables=("u",))(u=u) == expected


def test_floating_point_warnings_do_not_leak() -> None:
    """log of negatives, division by zero and overflow give nan/inf silently."""
    u = np.array([-1.0, 0.0, 1000.0])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        logs = compile_expression("log(u)", variables=("u",))(u=u)
        ratio = compile_expression("1/u", variables=("u",))(u=u)
        power = compile_expression("exp(u)", variables=("u",))(u=u)
    assert np.isnan(logs[0]) and logs[1] == -np.inf
    assert ratio[1] == np.inf
    assert power[2] == np.inf


def test_powers_are_float64_never_big_integers() -> None:
    """A huge exponent on a variable overflows to inf in float64 instead of building an integer."""
    huge = compile_expression("u**(9**9)", variables=("u",))
    np.testing.assert_array_equal(huge(u=np.array([9.0, 1.0, 0.5])), [np.inf, 1.0, 0.0])


def test_whitespace_and_line_breaks_are_spaces() -> None:
    """Leading spaces, tabs and line breaks (TOML multi-line strings) are accepted."""
    text = "  1 +\n\t2*u\n"
    assert compile_expression(text, variables=("u",))(u=1.0) == 3.0


def test_allowed_function_list_is_the_documented_one() -> None:
    """The whitelist holds exactly the documented functions with their arities."""
    arities = {name: len(arguments) for name, (_, arguments) in FUNCTIONS.items()}
    assert arities == {
        "exp": 1, "log": 1, "log1p": 1, "expm1": 1, "sqrt": 1, "abs": 1, "sin": 1,
        "cos": 1, "tan": 1, "tanh": 1, "arctan": 1, "minimum": 2, "maximum": 2, "clip": 3,
    }  # fmt: skip
    for name in arities:
        assert f"``{name}(" in expression_module.__doc__


# -- refusals -------------------------------------------------------------------

REFUSALS: list[tuple[str, str]] = [
    ("__import__('os')", r"unknown function '__import__'"),
    ("u.__class__", r"column 2: attribute access"),
    ("().__class__", r"attribute access"),
    ("open('x')", r"unknown function 'open'"),
    ("getattr(u, 'x')", r"unknown function 'getattr'"),
    ("__builtins__", r"unknown name '__builtins__'"),
    ("lambda: 1", r"a lambda"),
    ("[u for u in v]", r"list comprehension"),
    ("(u for u in v)", r"generator expression"),
    ("u if v else 1", r"conditional expression"),
    ("u < v", r"comparison"),
    ("u and v", r"logical operator 'and'/'or'"),
    ("not u", r"logical operator 'not'"),
    ('"a"', r"string literal"),
    ("b'x'", r"bytes literal"),
    ("f'{u}'", r"f-string"),
    ("exp(u, v)", r"exp takes 1 argument\(s\); got 2"),
    ("clip(u, 0)", r"clip takes 3 argument\(s\); got 2"),
    ("exp(x=u)", r"column 5: the keyword argument 'x='"),
    ("exp(**u)", r"'\*\*' unpacking"),
    ("exp(*u)", r"starred argument"),
    ("exp(u)(v)", r"call of a call's result"),
    ("cos", r"'cos' is a function and must be called"),
    ("u[0]", r"column 2: subscript"),
    ("u[0:1]", r"subscript"),
    ("(u := 1)", r"assignment expression ':='"),
    ("(u, v)", r"a tuple"),
    ("{u: v}", r"a dict"),
    ("{u}", r"a set"),
    ("u ^ 2", r"bitwise operator '\^'"),
    ("u // 2", r"floor division '//'"),
    ("u % 2", r"remainder operator '%'"),
    ("u @ v", r"matrix multiplication '@'"),
    ("~u", r"bitwise operator '~'"),
    ("True", r"the boolean True"),
    ("None", r"the literal None"),
    ("...", r"the literal \.\.\."),
    ("1j", r"complex number 1j"),
    ("1e999", r"number 1e999 is not finite"),
    ("9**9**9", r"column 1: the constant part '9\*\*9\*\*9' evaluates to inf"),
    ("1/0 + u", r"constant part '1/0' evaluates to inf"),
    ("u + log(0)", r"column 5: the constant part 'log\(0\)' evaluates to -inf"),
    ("np.exp(u)", r"attribute access"),
    ("x + 1", r"unknown name 'x'"),
    ("u(2)", r"'u' is not a function"),
    ("2(u)", r"call of the number 2"),
    ("(yield)", r"'yield'"),
    ("await u", r"'await'"),
    ("u # comment", r"column 3: a comment '#'"),
    ("u \u2212 v", r"column 3: the character .* \(U\+2212\)"),
    ("u\x00", r"U\+0000"),
    ("", r"the expression is empty"),
    ("   \n ", r"the expression is empty"),
    ("u + ) v", r"column 5: syntax error: unmatched '\)'"),
    ("exp(u", r"syntax error: '\(' was never closed"),
    (
        "u" * (MAX_LENGTH + 1),
        rf"{MAX_LENGTH + 1} characters; the limit is {MAX_LENGTH}",
    ),
    ("(" * 201 + "u" + ")" * 201, r"syntax error: too many nested parentheses"),
    ("-" * (MAX_DEPTH + 10) + "u", rf"nests deeper than {MAX_DEPTH}"),
    ("+".join(["u"] * 150), rf"more than {MAX_NODES} syntax elements"),
    ("-" * 300 + "u", rf"more than {MAX_NODES} syntax elements"),
]


@pytest.mark.parametrize(
    ("text", "pattern"), REFUSALS, ids=[repr(t[:30]) for t, _ in REFUSALS]
)
def test_disallowed_constructs_are_refused_by_name(text: str, pattern: str) -> None:
    """Every construct off the whitelist raises ExpressionError naming it and listing what is allowed."""
    with pytest.raises(ExpressionError, match=pattern) as caught:
        compile_expression(text, variables=UV)
    message = str(caught.value)
    assert "allowed: numbers; the variables u, v; the constants pi, e" in message
    assert "clip(x, lo, hi)" in message


@pytest.mark.parametrize(
    ("text", "suggestion"),
    [
        ("exq(u)", "'exp'"),
        ("sinh(u)", "'sin'"),
        ("Cos(u)", "'cos'"),
        ("2*PI*u", "'pi'"),
        ("uu + v", "'u'"),
        ("np.pi*u", "'pi' without the 'np.' prefix"),
        ("u^2", "use '\\*\\*' for powers"),
    ],
)
def test_misspelt_names_get_a_suggestion(text: str, suggestion: str) -> None:
    """Unknown names and common slips come with a hint naming the likely intent."""
    with pytest.raises(ExpressionError, match=rf"hint: .*{suggestion}"):
        compile_expression(text, variables=UV)


def test_columns_count_leading_spaces_and_line_breaks() -> None:
    """Reported columns index the text as written, including stripped spaces and newlines."""
    with pytest.raises(ExpressionError, match=r"column 4: attribute access"):
        compile_expression("  u.x", variables=UV)
    with pytest.raises(ExpressionError, match=r"column 8: attribute access"):
        compile_expression("u +\n  v.x", variables=UV)


def test_error_shows_a_caret_under_the_column() -> None:
    """Short one-line expressions are echoed with a caret under the offending column."""
    with pytest.raises(ExpressionError) as caught:
        compile_expression("1 + u[0]", variables=UV)
    lines = str(caught.value).splitlines()
    echo, caret = lines[1], lines[2]
    assert echo.strip() == "1 + u[0]"
    assert caret.index("^") == echo.index("[")


def test_nested_parentheses_within_the_parser_limit_are_fine() -> None:
    """Redundant parentheses add no syntax nodes and are accepted up to Python's nesting limit."""
    text = "(" * 150 + "u" + ")" * 150
    assert compile_expression(text, variables=("u",))(u=2.0) == 2.0


def test_non_string_text_is_refused() -> None:
    """A number or list where a string was expected raises ExpressionError."""
    for value in (1.5, ["u"], None):
        with pytest.raises(
            ExpressionError, match=r"expected a string; got a value of type"
        ):
            compile_expression(value, variables=UV)  # type: ignore[arg-type]


# -- the object ----------------------------------------------------------------------


def test_expression_validates_on_construction_and_pickles() -> None:
    """Expression(...) compiles itself, compares by text and variables, and survives pickling."""
    kernel = Expression("u*v + 1", ("u", "v"))
    assert kernel == compile_expression("u*v + 1", variables=UV)
    assert hash(kernel) == hash(compile_expression("u*v + 1", variables=UV))
    restored = pickle.loads(pickle.dumps(kernel))
    assert restored == kernel
    assert restored(u=2.0, v=3.0) == 7.0
    with pytest.raises(ExpressionError):
        Expression("u.x", ("u",))


def test_call_requires_exactly_the_declared_variables() -> None:
    """Missing or unexpected variables at call time are a TypeError (a bug in the caller)."""
    kernel = compile_expression("u*v", variables=UV)
    with pytest.raises(TypeError, match=r"missing \['v'\]"):
        kernel(u=1.0)
    with pytest.raises(TypeError, match=r"unexpected \['w'\]"):
        kernel(u=1.0, v=1.0, w=1.0)


@pytest.mark.parametrize(
    "variables", [("u", "u"), ("pi",), ("exp",), ("1u",), ("\u00fc",)]
)
def test_bad_variable_declarations_are_a_value_error(
    variables: tuple[str, ...],
) -> None:
    """Variable names must be distinct ASCII identifiers that shadow no constant or function."""
    with pytest.raises(ValueError, match=r"variable"):
        compile_expression("1", variables=variables)


@pytest.mark.parametrize("variables", ["uv", None])
def test_variables_must_be_a_tuple(variables: object) -> None:
    """A string or None where a tuple of names belongs is a TypeError (a bug in the caller)."""
    with pytest.raises(TypeError, match=r"variables must be a tuple of names"):
        compile_expression("1", variables=variables)  # type: ignore[arg-type]


def test_module_examples_run() -> None:
    """The docstring examples run as doctests."""
    assert doctest.testmod(expression_module).failed == 0


# -- property: arbitrary text is refused cleanly or evaluates ------------------------

TOKENS = [
    "u", "v", "x", "pi", "e", "1", "2.5", "0", "1e308", "9", "**", "*", "/", "+", "-",
    "(", ")", ",", " ", "exp", "log", "sqrt", "clip", "minimum", "cos", ".", "__class__",
    "[", "]", "{", "}", ":", ":=", "lambda", "if", "else", "for", "in", "not", "and",
    "<", "==", "'", '"', "f'", "j", "_", "#", "\\", "\n", "\t", "@", "%", "^", "~",
    "yield", "await", "import", "\x00", "\u2212", "\u03c0",
]  # fmt: skip


@settings(deadline=None, max_examples=300)
@given(
    text=st.one_of(
        st.text(max_size=80),
        st.lists(st.sampled_from(TOKENS), max_size=30).map("".join),
    ),
    seed=st.integers(0, 2**32 - 1),
)
@example(text="9**9**9", seed=0)
@example(text="u**" * 100 + "u", seed=0)
@example(text="\x00", seed=0)
@example(text="1" * 450, seed=0)
@example(text="(" * 240 + ")" * 240, seed=0)
def test_random_text_raises_only_expression_error(text: str, seed: int) -> None:
    """Random text either raises ExpressionError or compiles to an evaluator that returns an array."""
    try:
        compiled = compile_expression(text, variables=UV)
    except ExpressionError:
        return
    u, v = _arrays(seed, size=5)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        result = compiled(u=u, v=v)
    assert result.dtype == np.float64
    assert result.shape == (5,)


# -- property: generated grammar matches an independent reference ---------------------

# Precedence levels of Python's grammar for the whitelisted operators.
ADDITIVE, MULTIPLICATIVE, UNARY, POWER, ATOM = 1, 2, 3, 4, 5

REFERENCE_FUNCTIONS: dict[str, tuple[Callable[..., np.ndarray], int]] = {
    "exp": (np.exp, 1), "log": (np.log, 1), "log1p": (np.log1p, 1), "expm1": (np.expm1, 1),
    "sqrt": (np.sqrt, 1), "abs": (np.abs, 1), "sin": (np.sin, 1), "cos": (np.cos, 1),
    "tan": (np.tan, 1), "tanh": (np.tanh, 1), "arctan": (np.arctan, 1),
    "minimum": (np.minimum, 2), "maximum": (np.maximum, 2), "clip": (np.clip, 3),
}  # fmt: skip

REFERENCE_BINARY: dict[str, tuple[Callable[[np.ndarray, np.ndarray], np.ndarray], int]] = {
    "+": (np.add, ADDITIVE), "-": (np.subtract, ADDITIVE),
    "*": (np.multiply, MULTIPLICATIVE), "/": (np.divide, MULTIPLICATIVE),
    "**": (np.power, POWER),
}  # fmt: skip


class Node(NamedTuple):
    """A generated expression: its text and how the reference evaluates it."""

    text: str
    precedence: int
    evaluate: Callable[[Mapping[str, np.ndarray]], np.ndarray]
    constant: bool  # no variables anywhere below
    nonfinite_constant: (
        bool  # some variable-free part is not finite (the compiler refuses it)
    )
    size: int  # syntax nodes, as the compiler counts them
    depth: int


def _parenthesized(node: Node) -> Node:
    return node._replace(text=f"({node.text})", precedence=ATOM)


def _finalize(node: Node) -> Node:
    # A variable-free part must be finite, else compile_expression refuses the whole text.
    if node.constant and not node.nonfinite_constant:
        with np.errstate(all="ignore"):
            value = node.evaluate({})
        return node._replace(nonfinite_constant=not np.isfinite(value))
    return node


def _leaf(text: str, evaluate: Callable, constant: bool) -> Node:
    return Node(text, ATOM, evaluate, constant, False, 1, 1)


def _variable_leaf(name: str) -> Node:
    return _leaf(name, lambda env: env[name], False)


def _constant_leaf(text: str, value: float) -> Node:
    number = np.float64(value)
    return _leaf(text, lambda env: number, True)


_LEAVES = st.one_of(
    st.sampled_from(["u", "v"]).map(_variable_leaf),
    st.sampled_from(["pi", "e"]).map(
        lambda name: _constant_leaf(name, getattr(np, name))
    ),
    st.integers(0, 20).map(lambda i: _constant_leaf(str(i), i)),
    st.floats(0.0, 50.0, allow_nan=False).map(lambda f: _constant_leaf(repr(f), f)),
)


@st.composite
def _compound(draw: st.DrawFn, children: st.SearchStrategy[Node]) -> Node:
    kind = draw(st.sampled_from(["binary", "unary", "call", "parentheses"]))
    space = draw(st.sampled_from(["", " "]))
    if kind == "parentheses":
        return _parenthesized(draw(children))
    if kind == "unary":
        sign = draw(st.sampled_from(["-", "+"]))
        operand = draw(children)
        if operand.precedence < UNARY:
            operand = _parenthesized(operand)
        inner = operand.evaluate
        evaluate = (lambda env: np.negative(inner(env))) if sign == "-" else inner
        return _finalize(
            Node(f"{sign}{space}{operand.text}", UNARY, evaluate, operand.constant,
                 operand.nonfinite_constant, operand.size + 1, operand.depth + 1)
        )  # fmt: skip
    if kind == "binary":
        symbol = draw(st.sampled_from(sorted(REFERENCE_BINARY)))
        ufunc, precedence = REFERENCE_BINARY[symbol]
        left, right = draw(children), draw(children)
        if precedence == POWER:
            # ** is right-associative and takes a unary operand on its right: 2**-u.
            left_needs, right_needs = left.precedence <= POWER, right.precedence < UNARY
        else:
            # Left-associative: an equal-precedence right operand needs parentheses, which
            # also keeps float evaluation order (a+b)+c vs a+(b+c) exactly as generated.
            left_needs, right_needs = (
                left.precedence < precedence,
                right.precedence <= precedence,
            )
        left = _parenthesized(left) if left_needs or draw(st.booleans()) else left
        right = _parenthesized(right) if right_needs or draw(st.booleans()) else right
        le, re_ = left.evaluate, right.evaluate
        return _finalize(
            Node(f"{left.text}{space}{symbol}{space}{right.text}", precedence,
                 lambda env: ufunc(le(env), re_(env)), left.constant and right.constant,
                 left.nonfinite_constant or right.nonfinite_constant,
                 left.size + right.size + 1, max(left.depth, right.depth) + 1)
        )  # fmt: skip
    name = draw(st.sampled_from(sorted(REFERENCE_FUNCTIONS)))
    function, arity = REFERENCE_FUNCTIONS[name]
    arguments = [draw(children) for _ in range(arity)]
    evaluators = [argument.evaluate for argument in arguments]
    return _finalize(
        Node(f"{name}({(',' + space).join(a.text for a in arguments)})", ATOM,
             lambda env: function(*[f(env) for f in evaluators]),
             all(a.constant for a in arguments),
             any(a.nonfinite_constant for a in arguments),
             sum(a.size for a in arguments) + 2,  # the call and its function name
             max(a.depth for a in arguments) + 1)
    )  # fmt: skip


EXPRESSIONS = st.recursive(
    _LEAVES, lambda children: _compound(children), max_leaves=16
).map(_finalize)


@settings(deadline=None, max_examples=300)
@given(node=EXPRESSIONS, seed=st.integers(0, 2**32 - 1))
@example(
    node=Node(
        "-u**2",
        UNARY,
        lambda env: np.negative(np.power(env["u"], 2.0)),
        False,
        False,
        4,
        3,
    ),
    seed=1,
)
def test_generated_expressions_match_the_reference(node: Node, seed: int) -> None:
    """Grammar-generated expressions evaluate exactly as their tree mapped directly to numpy."""
    assume(
        len(node.text) <= MAX_LENGTH
        and node.size <= MAX_NODES
        and node.depth <= MAX_DEPTH
    )
    if node.nonfinite_constant:
        with pytest.raises(ExpressionError, match=r"constant part"):
            compile_expression(node.text, variables=UV)
        return
    rng = np.random.default_rng(seed)
    u = rng.uniform(0.0, 1.0, size=(4, 1))
    v = rng.normal(0.0, 2.0, size=(1, 3))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        result = compile_expression(node.text, variables=UV)(u=u, v=v)
    with np.errstate(all="ignore"):
        expected = np.broadcast_to(node.evaluate({"u": u, "v": v}), (4, 3))
    # Same ufuncs on the same float64 values in the same order: equal bit for bit (nan == nan).
    np.testing.assert_array_equal(result, expected, err_msg=node.text)
