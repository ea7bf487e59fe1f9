"""Whitelisted arithmetic expressions from scenario files.

A scenario may state a graphon kernel as an expression in ``u`` and ``v``
(``"1 + 0.7*cos(2*pi*u)*cos(2*pi*v)"``) and a latent-type outcome
heterogeneity as an expression in ``u`` (``"2*u - 1"``). Nothing in a
scenario may ever run code, so the text is parsed with :func:`ast.parse`
(``mode="eval"``), every node is checked against a small whitelist, and the
validated tree is turned into a tree of small closures over numpy ufuncs.
The text is never passed to ``eval``, ``exec`` or ``compile``.

The whitelist, in full:

* numbers: int and float literals (``2``, ``0.5``, ``1e-3``); not booleans,
  not complex numbers, and finite in float64;
* the variables the caller names (``u``, ``v``, ...);
* the constants ``pi`` and ``e``;
* unary ``+`` and ``-``; binary ``+ - * /`` and ``**`` (power), with
  Python's precedence, so ``-u**2`` is ``-(u**2)`` and ``2**3**2`` is
  ``2**(3**2)``; parentheses;
* calls, with positional arguments and exactly this arity, of
  ``exp(x)``, ``log(x)`` (natural), ``log1p(x)``, ``expm1(x)``, ``sqrt(x)``,
  ``abs(x)``, ``sin(x)``, ``cos(x)``, ``tan(x)``, ``tanh(x)``, ``arctan(x)``,
  ``minimum(x, y)``, ``maximum(x, y)`` and ``clip(x, lo, hi)``, which is
  ``minimum(maximum(x, lo), hi)``.

Comparisons, conditionals, ``floor`` and the like are deliberately absent:
the kernels and heterogeneity functions this tool needs are smooth or
piecewise-smooth arithmetic, and ``minimum``/``maximum``/``clip`` cover the
piecewise cases.

Line breaks and tabs count as spaces, so a TOML multi-line string works.
Anything else (attribute access, subscripts, comparisons, lambdas,
comprehensions, strings, f-strings, keyword or starred arguments, ``:=``,
unknown names, calls of anything but a listed function, comments, non-ASCII
characters) raises :class:`~designcalc.errors.ExpressionError` naming the
construct, its 1-based column and what is allowed, with a "did you mean"
suggestion for misspelt names.

Resource limits: at most 500 characters, 200 syntax nodes and nesting depth
100. Evaluation is in float64 throughout, so ``**`` can never build a giant
Python integer; a constant part of the expression (one without variables) is
evaluated once at compile time in float64 and must be finite, so ``9**9**9``
(float64 overflow to ``inf``), ``1/0`` and ``log(0)`` are rejected when the
scenario is loaded rather than surfacing as a non-finite kernel later.
Parts that involve variables are not checked: the caller validates the
values it gets (finiteness, symmetry, non-negativity) on its own grid.
"""

from __future__ import annotations

import ast
import difflib
import functools
import math
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

import numpy as np

from designcalc.errors import ExpressionError

__all__ = [
    "CONSTANTS",
    "FUNCTIONS",
    "MAX_DEPTH",
    "MAX_LENGTH",
    "MAX_NODES",
    "Expression",
    "compile_expression",
]

MAX_LENGTH = 500
MAX_NODES = 200
MAX_DEPTH = 100


def _clip(x: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    # Spelled out so the meaning for lo > hi (the result is hi) is the documented one.
    return np.minimum(np.maximum(x, lo), hi)


# name -> (implementation, argument names shown in messages)
FUNCTIONS: Mapping[str, tuple[Callable[..., np.ndarray], tuple[str, ...]]] = {
    "exp": (np.exp, ("x",)),
    "log": (np.log, ("x",)),
    "log1p": (np.log1p, ("x",)),
    "expm1": (np.expm1, ("x",)),
    "sqrt": (np.sqrt, ("x",)),
    "abs": (np.absolute, ("x",)),
    "sin": (np.sin, ("x",)),
    "cos": (np.cos, ("x",)),
    "tan": (np.tan, ("x",)),
    "tanh": (np.tanh, ("x",)),
    "arctan": (np.arctan, ("x",)),
    "minimum": (np.minimum, ("x", "y")),
    "maximum": (np.maximum, ("x", "y")),
    "clip": (_clip, ("x", "lo", "hi")),
}

CONSTANTS: Mapping[str, float] = {"pi": math.pi, "e": math.e}

_BINARY_OPERATORS: dict[
    type[ast.operator], Callable[[np.ndarray, np.ndarray], np.ndarray]
] = {
    ast.Add: np.add,
    ast.Sub: np.subtract,
    ast.Mult: np.multiply,
    ast.Div: np.true_divide,
    ast.Pow: np.power,
}

# Human names for constructs that are refused, with a hint where a common slip explains them.
_REFUSED_OPERATORS: dict[type[ast.AST], tuple[str, str]] = {
    ast.FloorDiv: ("floor division '//'", "use '/' for division"),
    ast.Mod: ("the remainder operator '%'", ""),
    ast.MatMult: ("matrix multiplication '@'", "use '*' for multiplication"),
    ast.BitXor: ("the bitwise operator '^'", "use '**' for powers, e.g. u**2"),
    ast.BitAnd: ("the bitwise operator '&'", ""),
    ast.BitOr: ("the bitwise operator '|'", ""),
    ast.LShift: ("the shift operator '<<'", ""),
    ast.RShift: ("the shift operator '>>'", ""),
    ast.Invert: ("the bitwise operator '~'", ""),
    ast.Not: ("the logical operator 'not'", ""),
}

_REFUSED_NODES: dict[type[ast.AST], str] = {
    ast.Attribute: "attribute access '.'",
    ast.Subscript: "subscript '[...]'",
    ast.Slice: "slice ':'",
    ast.Compare: "a comparison",
    ast.BoolOp: "the logical operator 'and'/'or'",
    ast.IfExp: "a conditional expression 'if ... else'",
    ast.Lambda: "a lambda",
    ast.ListComp: "a list comprehension",
    ast.SetComp: "a set comprehension",
    ast.DictComp: "a dict comprehension",
    ast.GeneratorExp: "a generator expression",
    ast.List: "a list '[...]'",
    ast.Tuple: "a tuple",
    ast.Set: "a set '{...}'",
    ast.Dict: "a dict '{...}'",
    ast.JoinedStr: "an f-string",
    ast.FormattedValue: "an f-string",
    ast.NamedExpr: "an assignment expression ':='",
    ast.Starred: "a starred expression '*'",
    ast.Await: "'await'",
    ast.Yield: "'yield'",
    ast.YieldFrom: "'yield from'",
}

# Characters people paste from papers, and what to type instead.
_CHARACTER_HINTS = {
    "\u2212": "-",
    "\u2013": "-",
    "\u00d7": "*",
    "\u00b7": "*",
    "\u22c5": "*",
    "\u00f7": "/",
    "\u03c0": "pi",
    "\u00b2": "**2",
    "\u00b3": "**3",
    "\u00a0": "a plain space",
}

_Evaluator = Callable[[Mapping[str, np.ndarray]], np.ndarray]


def _allowed_summary(variables: tuple[str, ...]) -> str:
    names = ", ".join(variables) if variables else "(none)"
    calls = ", ".join(
        f"{name}({', '.join(args)})" for name, (_, args) in FUNCTIONS.items()
    )
    return (
        f"numbers; the variables {names}; the constants {', '.join(CONSTANTS)}; "
        f"+ - * / ** and parentheses; the functions {calls}"
    )


class _Compiler:
    """Validates one parsed expression and builds its evaluator."""

    def __init__(
        self, text: str, source: str, offset: int, variables: tuple[str, ...]
    ) -> None:
        self.text = text  # the user's text, for messages
        self.source = source  # what was parsed (whitespace normalised, left-stripped)
        self.offset = offset  # characters stripped from the left of ``text``
        self.variables = variables

    # -- messages --------------------------------------------------------------
    def fail(self, problem: str, column: int | None, hint: str = "") -> ExpressionError:
        """An ExpressionError stating the problem, where it is, and what is allowed."""
        return _error(self.text, problem, column, self.variables, hint)

    def refuse(
        self, construct: str, column: int | None, hint: str = ""
    ) -> ExpressionError:
        """An ExpressionError for a construct that is off the whitelist."""
        return self.fail(f"{construct} is not allowed", column, hint)

    def column(self, node: ast.AST) -> int:
        # col_offset counts UTF-8 bytes; the text is ASCII by now, so bytes are characters.
        return self.offset + getattr(node, "col_offset", 0) + 1

    def segment(self, node: ast.AST) -> str:
        return _shorten(ast.get_source_segment(self.source, node) or "?", 40)

    def suggest(self, name: str, candidates: list[str]) -> str:
        # Compare case-insensitively so PI, Exp and Cos find pi, exp and cos.
        lowered = {candidate.lower(): candidate for candidate in candidates}
        matches = difflib.get_close_matches(
            name.lower(), list(lowered), n=3, cutoff=0.6
        )
        if not matches:
            return ""
        return "did you mean " + " or ".join(repr(lowered[m]) for m in matches) + "?"

    # -- checks before compiling -----------------------------------------------
    def check_size(self, tree: ast.Expression) -> None:
        # Only positioned nodes count: operator and context singletons carry no col_offset.
        # Iterative, so a pathological tree cannot exhaust the Python stack here; the size
        # is checked over the whole tree first so that a long sum reports its size, not depth.
        nodes = [(tree.body, 1)]
        for node, depth in nodes:  # breadth-first: the list grows while it is read
            if len(nodes) > MAX_NODES:
                raise self.fail(
                    f"the expression has more than {MAX_NODES} syntax elements", None
                )
            nodes.extend(
                (child, depth + 1)
                for child in ast.iter_child_nodes(node)
                if hasattr(child, "col_offset")
            )
        node, depth = max(nodes, key=lambda item: item[1])
        if depth > MAX_DEPTH:
            # The compiler and evaluator recurse once per level; this keeps them far from
            # Python's recursion limit whatever stack the caller already uses.
            raise self.fail(
                f"the expression nests deeper than {MAX_DEPTH} levels",
                self.column(node),
            )

    # -- compiling ---------------------------------------------------------------
    def build(self, node: ast.AST) -> tuple[_Evaluator, bool]:
        """The evaluator of ``node`` and whether it is free of variables."""
        evaluator, constant = self.build_node(node)
        if constant:
            evaluator = self.fold(node, evaluator)
        return evaluator, constant

    def build_node(self, node: ast.AST) -> tuple[_Evaluator, bool]:
        if isinstance(node, ast.Constant):
            return self.build_number(node), True
        if isinstance(node, ast.Name):
            return self.build_name(node)
        if isinstance(node, ast.UnaryOp):
            return self.build_unary(node)
        if isinstance(node, ast.BinOp):
            return self.build_binary(node)
        if isinstance(node, ast.Call):
            return self.build_call(node)
        what = _REFUSED_NODES.get(type(node), f"the construct {type(node).__name__}")
        hint = ""
        if isinstance(node, ast.Attribute):
            if isinstance(node.value, ast.Name) and (
                node.attr in FUNCTIONS or node.attr in CONSTANTS
            ):
                hint = f"write {node.attr!r} without the {node.value.id + '.'!r} prefix"
        elif isinstance(node, ast.Compare | ast.IfExp | ast.BoolOp):
            hint = "for piecewise functions use minimum, maximum or clip"
        elif isinstance(node, ast.Tuple):
            hint = "a ',' outside a function call makes a tuple"
        column = self.column(node)
        if isinstance(node, ast.Attribute | ast.Subscript):
            # Point at the '.' or '[' rather than at the start of what precedes it.
            column = self.offset + (node.value.end_col_offset or 0) + 1
        raise self.refuse(what, column, hint)

    def build_number(self, node: ast.Constant) -> _Evaluator:
        value = node.value
        column = self.column(node)
        if isinstance(value, bool):
            raise self.refuse(f"the boolean {value!r}", column)
        if isinstance(value, str):
            raise self.refuse("a string literal", column)
        if isinstance(value, bytes):
            raise self.refuse("a bytes literal", column)
        if isinstance(value, complex):
            raise self.refuse(f"the complex number {self.segment(node)}", column)
        if not isinstance(value, int | float):
            raise self.refuse(f"the literal {self.segment(node)}", column)
        try:
            number = np.float64(float(value))
        except OverflowError:
            number = np.float64(np.inf)
        if not np.isfinite(number):
            raise self.fail(
                f"the number {self.segment(node)} is not finite in float64", column
            )
        return lambda env: number

    def build_name(self, node: ast.Name) -> tuple[_Evaluator, bool]:
        name = node.id
        if name in self.variables:
            return (lambda env: env[name]), False
        if name in CONSTANTS:
            number = np.float64(CONSTANTS[name])
            return (lambda env: number), True
        column = self.column(node)
        if name in FUNCTIONS:
            args = ", ".join(FUNCTIONS[name][1])
            raise self.fail(
                f"{name!r} is a function and must be called",
                column,
                f"e.g. {name}({args})",
            )
        hint = self.suggest(name, [*self.variables, *CONSTANTS, *FUNCTIONS])
        raise self.refuse(f"the unknown name {name!r}", column, hint)

    def build_unary(self, node: ast.UnaryOp) -> tuple[_Evaluator, bool]:
        if isinstance(node.op, ast.UAdd):
            return self.build(node.operand)
        if isinstance(node.op, ast.USub):
            operand, constant = self.build(node.operand)
            return (lambda env: np.negative(operand(env))), constant
        what, hint = _REFUSED_OPERATORS.get(type(node.op), (type(node.op).__name__, ""))
        raise self.refuse(what, self.column(node), hint)

    def build_binary(self, node: ast.BinOp) -> tuple[_Evaluator, bool]:
        ufunc = _BINARY_OPERATORS.get(type(node.op))
        if ufunc is None:
            what, hint = _REFUSED_OPERATORS.get(
                type(node.op), (type(node.op).__name__, "")
            )
            # BinOp has no position of its own operator; point at the gap after the left side.
            column = self.offset + (getattr(node.left, "end_col_offset", None) or 0) + 1
            raise self.refuse(what, column, hint)
        left, left_constant = self.build(node.left)
        right, right_constant = self.build(node.right)

        def evaluate(env: Mapping[str, np.ndarray]) -> np.ndarray:
            return ufunc(left(env), right(env))

        return evaluate, left_constant and right_constant

    def build_call(self, node: ast.Call) -> tuple[_Evaluator, bool]:
        column = self.column(node)
        func = node.func
        if not isinstance(func, ast.Name):
            if isinstance(func, ast.Call):
                raise self.refuse("a call of a call's result", column)
            if isinstance(func, ast.Constant):
                raise self.refuse(
                    f"a call of the number {self.segment(func)}",
                    column,
                    f"write '*' for multiplication, e.g. {self.segment(func)}*(...)",
                )
            if isinstance(func, ast.Attribute):
                return self.build(func)  # the attribute access is the real problem
            raise self.refuse(f"a call of {self.segment(func)!r}", column)
        name = func.id
        if name not in FUNCTIONS:
            if name in self.variables or name in CONSTANTS:
                raise self.fail(
                    f"{name!r} is not a function, so it cannot be called",
                    column,
                    f"write '*' for multiplication, e.g. {name}*(...)",
                )
            hint = self.suggest(name, list(FUNCTIONS))
            raise self.refuse(f"a call of the unknown function {name!r}", column, hint)
        implementation, argument_names = FUNCTIONS[name]
        signature = f"{name}({', '.join(argument_names)})"
        if node.keywords:
            keyword = node.keywords[0]
            shown = f"'{keyword.arg}='" if keyword.arg is not None else "'**' unpacking"
            raise self.refuse(
                f"the keyword argument {shown} in {name}(...)",
                self.column(keyword),
                f"pass arguments by position: {signature}",
            )
        for argument in node.args:
            if isinstance(argument, ast.Starred):
                raise self.refuse(
                    f"a starred argument in {name}(...)", self.column(argument)
                )
        if len(node.args) != len(argument_names):
            raise self.fail(
                f"{name} takes {len(argument_names)} argument(s); got {len(node.args)}",
                column,
                f"write {signature}",
            )
        built = [self.build(argument) for argument in node.args]
        arguments = [evaluator for evaluator, _ in built]
        constant = all(is_constant for _, is_constant in built)
        if len(arguments) == 1:
            (only,) = arguments
            return (lambda env: implementation(only(env))), constant
        return (lambda env: implementation(*[a(env) for a in arguments])), constant

    def fold(self, node: ast.AST, evaluator: _Evaluator) -> _Evaluator:
        """Evaluate a variable-free part once, in float64, and insist that it is finite.

        Folding is exact: at call time this part would meet the same ufuncs on the
        same float64 scalars.
        """
        with np.errstate(all="ignore"):
            value = np.float64(evaluator({}))
        if not np.isfinite(value):
            raise self.fail(
                f"the constant part {self.segment(node)!r} evaluates to {float(value)} "
                "in float64 arithmetic",
                self.column(node),
                "overflow, division by zero and domain errors (log of 0, sqrt of a "
                "negative number) give non-finite values; change the numbers",
            )
        return lambda env: value


def _error(
    text: str,
    problem: str,
    column: int | None,
    variables: tuple[str, ...],
    hint: str = "",
) -> ExpressionError:
    if column is None:
        lines = [f"expression {_shorten(text)!r}: {problem}"]
    else:
        lines = [f"expression {_shorten(text)!r}, column {column}: {problem}"]
        if len(text) <= 120 and "\n" not in text and "\r" not in text:
            lines += [f"    {text}", "    " + " " * (column - 1) + "^"]
    lines.append(f"  allowed: {_allowed_summary(variables)}")
    if hint:
        lines.append(f"  hint: {hint}")
    return ExpressionError("\n".join(lines))


def _shorten(text: str, width: int = 60) -> str:
    return text if len(text) <= width else text[: width - 3] + "..."


def _check_characters(text: str, variables: tuple[str, ...]) -> None:
    for index, character in enumerate(text):
        if character == "#":
            raise _error(
                text,
                "a comment '#' is not allowed",
                index + 1,
                variables,
                "put comments in the TOML file, outside the string",
            )
        if not (" " <= character <= "~" or character in "\t\n\r"):
            replacement = _CHARACTER_HINTS.get(character)
            hint = f"type {replacement!r} instead" if replacement else "use plain ASCII"
            if replacement == "a plain space":
                hint = "type a plain space instead"
            raise _error(
                text,
                f"the character {character!r} (U+{ord(character):04X}) is not allowed",
                index + 1,
                variables,
                hint,
            )


@functools.lru_cache(maxsize=256)
def _compile(text: str, variables: tuple[str, ...]) -> _Evaluator:
    # Cached: callers may recompile the same scenario text on every evaluation.
    if len(text) > MAX_LENGTH:
        raise _error(
            text,
            f"the expression has {len(text)} characters; the limit is {MAX_LENGTH}",
            None,
            variables,
        )
    _check_characters(text, variables)
    # Tabs and line breaks become spaces (column-preserving), so TOML multi-line strings work;
    # leading spaces would be an IndentationError, so strip them and shift columns back.
    flat = text.translate({ord("\t"): " ", ord("\n"): " ", ord("\r"): " "})
    source = flat.lstrip(" ")
    offset = len(flat) - len(source)
    if not source.strip():
        raise _error(
            text, "the expression is empty", None, variables, "write e.g. 1 + u"
        )
    try:
        with warnings.catch_warnings():
            # e.g. "2(u)" may warn "'int' object is not callable"; our own message is clearer.
            warnings.simplefilter("ignore")
            tree = ast.parse(source, mode="eval")
    except SyntaxError as exc:
        # offset is 1-based; some end-of-input errors report 0 or nothing.
        where = exc.offset if exc.offset and exc.offset > 0 else len(source) + 1
        column = min(offset + where, len(text) + 1)
        reason = exc.msg or "invalid syntax"
        raise _error(text, f"syntax error: {reason}", column, variables) from None
    except (ValueError, RecursionError, MemoryError) as exc:  # defensive: parser limits
        problem = f"the text cannot be parsed ({type(exc).__name__})"
        raise _error(text, problem, None, variables) from None
    compiler = _Compiler(text, source, offset, variables)
    compiler.check_size(tree)
    evaluator, _ = compiler.build(tree.body)
    return evaluator


def _check_variables(variables: object) -> tuple[str, ...]:
    # These come from code, not from a scenario, so a mistake here is a bug, not an ExpressionError.
    if isinstance(variables, str) or not isinstance(variables, tuple | list):
        raise TypeError(f"variables must be a tuple of names; got {variables!r}")
    names = tuple(variables)
    for name in names:
        if not isinstance(name, str) or not name.isidentifier() or not name.isascii():
            raise ValueError(f"variable names must be ASCII identifiers; got {name!r}")
        if name in FUNCTIONS or name in CONSTANTS:
            raise ValueError(
                f"variable name {name!r} clashes with a function or constant"
            )
    if len(set(names)) != len(names):
        raise ValueError(f"variable names must be distinct; got {names!r}")
    return names


@dataclass(frozen=True)
class Expression:
    """A validated arithmetic expression, callable on numpy arrays.

    Constructing one validates and compiles ``text``; see the module
    docstring for the whitelist. Equality and hashing use ``text`` and
    ``variables`` only; pickling recompiles from the text.

    Parameters
    ----------
    text
        The expression as written in the scenario.
    variables
        The names the expression may use, in the order callers document.

    Raises
    ------
    ExpressionError
        If ``text`` is not a string or uses anything off the whitelist.
    """

    text: str
    variables: tuple[str, ...]
    _evaluate: _Evaluator = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        variables = _check_variables(self.variables)
        object.__setattr__(self, "variables", variables)
        if not isinstance(self.text, str):
            raise _error(
                repr(self.text),
                f"expected a string; got a value of type {type(self.text).__name__}",
                None,
                variables,
                'write the expression in quotes, e.g. "1 + u"',
            )
        object.__setattr__(self, "_evaluate", _compile(self.text, variables))

    def __reduce__(self) -> tuple[type[Expression], tuple[str, tuple[str, ...]]]:
        # Closures do not pickle; the text is the whole state, so process pools get it instead.
        return (type(self), (self.text, self.variables))

    def __call__(self, **values: np.ndarray | float) -> np.ndarray:
        """Evaluate elementwise in float64.

        Parameters
        ----------
        **values
            One array or number per variable, by name; they are broadcast
            against each other (``u[:, None]`` and ``v[None, :]`` give a grid).

        Returns
        -------
        numpy.ndarray
            A new float64 array of the inputs' broadcast shape; a constant
            expression is broadcast to that shape too. Floating-point
            warnings are suppressed: overflow, division by zero and domain
            errors give ``inf``/``nan``, which the caller checks.

        Raises
        ------
        TypeError
            If a variable is missing or an unknown name is passed.
        """
        missing = [name for name in self.variables if name not in values]
        unexpected = [name for name in values if name not in self.variables]
        if missing or unexpected:
            raise TypeError(
                f"expression {self.text!r} takes the variables {self.variables}; "
                f"missing {missing}, unexpected {unexpected}"
            )
        arrays = {
            name: np.asarray(values[name], dtype=np.float64) for name in self.variables
        }
        shape = np.broadcast_shapes(*(array.shape for array in arrays.values()))
        with np.errstate(all="ignore"):
            result = self._evaluate(arrays)
        # A fresh array: never hand back the caller's input (the expression "u") as the output.
        out = np.empty(shape, dtype=np.float64)
        out[...] = result
        return out


def compile_expression(text: str, *, variables: tuple[str, ...]) -> Expression:
    """Validate and compile a whitelisted arithmetic expression.

    Parameters
    ----------
    text
        The expression, e.g. ``"1 + 0.7*cos(2*pi*u)*cos(2*pi*v)"``.
    variables
        The variable names it may use, e.g. ``("u", "v")``.

    Returns
    -------
    Expression
        Callable with the variables as keyword arguments.

    Raises
    ------
    ExpressionError
        If the text is too long or too large, does not parse, or uses
        anything not on the whitelist (see the module docstring); the message
        names the construct and its column and lists what is allowed.

    Notes
    -----
    The text is parsed with :func:`ast.parse` and each node checked against
    the whitelist; the result is a tree of closures over numpy ufuncs, never
    code compiled from the text. Compiling is O(length of the text) and
    cached; evaluating costs one ufunc pass per syntax node over the
    broadcast inputs.

    Examples
    --------
    >>> import numpy as np
    >>> kernel = compile_expression("1 + 0.5*cos(2*pi*u)*cos(2*pi*v)", variables=("u", "v"))
    >>> kernel(u=np.array([0.0, 0.5]), v=np.array([0.0, 0.0]))
    array([1.5, 0.5])
    >>> compile_expression("2", variables=("u",))(u=np.zeros(3))
    array([2., 2., 2.])
    """
    return Expression(text, variables)
