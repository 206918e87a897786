r"""Coefficient expressions: text in ordinary math notation -> vectorised callable.

Problem files give coefficients such as the conductivity, the source and the
boundary values as short formulas of the coordinates ``x``, ``y`` and ``z``,
for example ``"1 + 0.5*sin(pi*x)*y^2"``.  :func:`compile_expression` reads such
a text once, checks every part of it against the grammar below, and returns an
:class:`Expression`: a callable that takes points ``x`` of shape
``(dim, n_points)`` and returns a float64 array of shape ``(n_points,)``.

The text is never run as Python code.  It is parsed with
``ast.parse(text, mode="eval")`` and the tree is walked with a whitelist; each
accepted node becomes a small NumPy closure, built once, so a call does no
parsing at all.

Grammar
-------
From the loosest binding to the tightest:

===========================  ====================================================
form                         meaning
===========================  ====================================================
``a if cond else b``         ``a`` where ``cond`` is true, else ``b`` (pointwise;
                             both branches are evaluated everywhere)
``a or b``, ``a and b``      logical or / and; every part is evaluated
``not a``                    logical not
``<  <=  >  >=  ==  !=``     comparisons; chains such as ``0 < x < 1`` allowed
``a + b``, ``a - b``         sum, difference
``a * b``, ``a / b``         product, quotient
``+a``, ``-a``               unary plus, minus
``a ^ b``, ``a ** b``        power, right-associative: ``2^3^2`` is ``2^9`` and
                             ``-x^2`` is ``-(x^2)``
``f(a, ...)``                a function from the table below
``( a )``                    grouping
``1``, ``2.5``, ``1e-3``     real numbers
``x``, ``y``, ``z``          coordinates (``dim=1``: ``x``; ``dim=2``: ``x, y``)
``pi``, ``e``                the constants pi and Euler's number
user names                   the entries of ``constants=``
===========================  ====================================================

Comparisons and ``and``/``or``/``not`` give 1.0 for true and 0.0 for false; as
a condition, any non-zero value counts as true.  ``^`` means power, not the
bitwise exclusive or of Python: before parsing, every ``^`` operator token is
rewritten to ``**`` (found with the tokenizer, so positions in messages still
refer to the text as written), which gives ``^`` the precedence of ``**``.

Functions (arguments in radians where angles are meant):

==========  =========  ==============================================
name        arguments  value
==========  =========  ==============================================
``sin``     1          sine
``cos``     1          cosine
``tan``     1          tangent
``asin``    1          inverse sine, in [-pi/2, pi/2]
``acos``    1          inverse cosine, in [0, pi]
``atan``    1          inverse tangent, in (-pi/2, pi/2)
``atan2``   2          ``atan2(b, a)``: angle of the point (a, b)
``sinh``    1          hyperbolic sine
``cosh``    1          hyperbolic cosine
``tanh``    1          hyperbolic tangent
``exp``     1          exponential
``log``     1          natural logarithm
``log10``   1          logarithm to base 10
``sqrt``    1          square root
``abs``     1          absolute value
``floor``   1          largest integer not above the argument
``ceil``    1          smallest integer not below the argument
``min``     2 or more  pointwise minimum of the arguments
``max``     2 or more  pointwise maximum of the arguments
==========  =========  ==============================================

Everything else is refused with :class:`~galerkit.errors.InputError`, whose
message names the coefficient, shows the text with a caret under the offending
character and says what to write instead: attribute access, indexing, calls of
anything not in the table, keyword or starred arguments, lambdas,
comprehensions, lists and tuples, strings and f-strings, ``:=`` and ``=``,
``;``, comments, complex numbers, ``True``/``False``/``None``, the operators
``%  //  @  &  |  ~  <<  >>``, ``is`` and ``in``, names not known (``t`` is not
a variable: coefficients here depend on position only), non-ASCII characters,
and texts that are empty, longer than :data:`MAX_LENGTH` characters, have more
than :data:`MAX_NODES` parts or nest deeper than :data:`MAX_DEPTH` levels.

At call time, operations outside their domain (``log`` of a negative number,
``1/0``, overflow) are carried out with NumPy warnings silenced; if the result
then holds a NaN or an infinity, :class:`~galerkit.errors.InputError` names
the coefficient, the first such point (its index and coordinates) and how many
points are affected.
"""

from __future__ import annotations

import ast
import difflib
import io
import keyword
import math
import numbers
import tokenize
import warnings
from collections.abc import Mapping
from functools import reduce
from typing import Callable, NoReturn

import numpy as np

from galerkit.errors import InputError

__all__ = [
    "Expression",
    "compile_expression",
    "FUNCTION_NAMES",
    "MAX_LENGTH",
    "MAX_NODES",
    "MAX_DEPTH",
]

#: Longest accepted expression text, in characters.
MAX_LENGTH = 2000
#: Most parts (numbers, names, operations, calls) an expression may have.
MAX_NODES = 500
#: Deepest accepted nesting of brackets and operations.  A chain of the same
#: kind of operation, such as ``a + b - c + d`` or ``a * b / c``, counts as one
#: level, however long.
MAX_DEPTH = 50

_COORDINATES = ("x", "y", "z")
_BUILTIN_CONSTANTS = {"pi": math.pi, "e": math.e}


def _minimum(*args):
    return reduce(np.minimum, args)


def _maximum(*args):
    return reduce(np.maximum, args)


# name -> (NumPy implementation, least number of arguments, most (None: any))
_FUNCTIONS: dict[str, tuple[Callable, int, int | None]] = {
    "sin": (np.sin, 1, 1),
    "cos": (np.cos, 1, 1),
    "tan": (np.tan, 1, 1),
    "asin": (np.arcsin, 1, 1),
    "acos": (np.arccos, 1, 1),
    "atan": (np.arctan, 1, 1),
    "atan2": (np.arctan2, 2, 2),
    "sinh": (np.sinh, 1, 1),
    "cosh": (np.cosh, 1, 1),
    "tanh": (np.tanh, 1, 1),
    "exp": (np.exp, 1, 1),
    "log": (np.log, 1, 1),
    "log10": (np.log10, 1, 1),
    "sqrt": (np.sqrt, 1, 1),
    "abs": (np.abs, 1, 1),
    "floor": (np.floor, 1, 1),
    "ceil": (np.ceil, 1, 1),
    "min": (_minimum, 2, None),
    "max": (_maximum, 2, None),
}

#: Names of the functions an expression may call, in the order of the table.
FUNCTION_NAMES = tuple(_FUNCTIONS)

_ALLOWED_FUNCTIONS_LINE = "allowed functions: " + ", ".join(FUNCTION_NAMES)

_GRAMMAR_HINT = (
    "write the coefficient with numbers, the coordinates, pi, e, + - * / ^ **, "
    "comparisons, and/or/not, 'a if condition else b' and the functions "
    + ", ".join(FUNCTION_NAMES)
)

# Operators refused, by AST class, with the text the user typed.
_REFUSED_OPERATORS = {
    ast.Mod: "%",
    ast.FloorDiv: "//",
    ast.MatMult: "@",
    ast.BitAnd: "&",
    ast.BitOr: "|",
    ast.BitXor: "^",
    ast.LShift: "<<",
    ast.RShift: ">>",
}

_COMPARISONS = {
    ast.Lt: np.less,
    ast.LtE: np.less_equal,
    ast.Gt: np.greater,
    ast.GtE: np.greater_equal,
    ast.Eq: np.equal,
    ast.NotEq: np.not_equal,
}

# Node classes refused outright, with the reason shown to the user.
_REFUSED_NODES = {
    ast.Attribute: ("attribute access with '.' is not allowed", _GRAMMAR_HINT),
    ast.Subscript: ("indexing with [...] is not allowed", _GRAMMAR_HINT),
    ast.Slice: ("indexing with [...] is not allowed", _GRAMMAR_HINT),
    ast.Lambda: ("lambda functions are not allowed", _GRAMMAR_HINT),
    ast.ListComp: ("comprehensions are not allowed", _GRAMMAR_HINT),
    ast.SetComp: ("comprehensions are not allowed", _GRAMMAR_HINT),
    ast.DictComp: ("comprehensions are not allowed", _GRAMMAR_HINT),
    ast.GeneratorExp: ("generator expressions are not allowed", _GRAMMAR_HINT),
    ast.List: ("lists are not allowed", _GRAMMAR_HINT),
    ast.Tuple: ("tuples are not allowed", _GRAMMAR_HINT),
    ast.Set: ("sets are not allowed", _GRAMMAR_HINT),
    ast.Dict: ("dictionaries are not allowed", _GRAMMAR_HINT),
    ast.JoinedStr: ("f-strings are not allowed", "write a number or a formula, not text"),
    ast.FormattedValue: ("f-strings are not allowed", "write a number or a formula, not text"),
    ast.NamedExpr: ("assignment with ':=' is not allowed", _GRAMMAR_HINT),
    ast.Starred: (
        "starred arguments (*...) are not allowed",
        "pass each argument on its own, for example max(x, y, 0)",
    ),
    ast.Await: ("'await' is not allowed", _GRAMMAR_HINT),
    ast.Yield: ("'yield' is not allowed", _GRAMMAR_HINT),
    ast.YieldFrom: ("'yield' is not allowed", _GRAMMAR_HINT),
}

# Hints for characters people type from math notation.
_CHARACTER_HINTS = {
    "\u03c0": "write pi",
    "\u00d7": "write * for multiplication",
    "\u00b7": "write * for multiplication",
    "\u22c5": "write * for multiplication",
    "\u00f7": "write / for division",
    "\u2212": "write the ASCII minus sign -",
    "\u00b2": "write ^2",
    "\u00b3": "write ^3",
    "\u2264": "write <=",
    "\u2265": "write >=",
    "\u2260": "write !=",
    "\u221a": "write sqrt(...)",
}

_NAME_HINTS = {
    "t": (
        "'t' is not a variable: coefficients here depend on position only; "
        "for a value that changes in time, build a new expression per step "
        "or pass it as a constant"
    ),
    "ln": "the natural logarithm is written log(...)",
    "pow": "powers are written a^b or a**b",
    "arcsin": "the inverse sine is written asin(...)",
    "arccos": "the inverse cosine is written acos(...)",
    "arctan": "the inverse tangent is written atan(...)",
    "arctan2": "write atan2(b, a)",
    "minimum": "the pointwise minimum is written min(a, b, ...)",
    "maximum": "the pointwise maximum is written max(a, b, ...)",
    "fabs": "the absolute value is written abs(...)",
}

_SHOW_WIDTH = 100  # longest line shown in full in a message
_INDENT = "    "


# ----------------------------------------------------------------------------
# messages
# ----------------------------------------------------------------------------


def _locate(text: str, index: int) -> tuple[int, int, str]:
    """Return (line number from 1, column from 0, line text) of ``index``."""
    index = max(0, min(index, len(text)))
    start = text.rfind("\n", 0, index) + 1
    end = text.find("\n", index)
    if end < 0:
        end = len(text)
    return text.count("\n", 0, index) + 1, index - start, text[start:end]


def _shown_line(line: str, col: int | None) -> tuple[str, str]:
    """The line as shown (shortened around ``col`` if long) and its caret line."""
    start, end = 0, len(line)
    pre = post = ""
    if len(line) > _SHOW_WIDTH:
        focus = 0 if col is None else col
        start = max(0, min(focus - _SHOW_WIDTH // 2, len(line) - _SHOW_WIDTH))
        end = min(len(line), start + _SHOW_WIDTH)
        pre = "..." if start > 0 else ""
        post = "..." if end < len(line) else ""
    shown = _INDENT + pre + line[start:end] + post
    if col is None:
        return shown, ""
    pad = "".join("\t" if c == "\t" else " " for c in pre + line[start:col])
    return shown, _INDENT + pad + "^"


def _message(name: str, what: str, text: str, index: int | None, todo: str) -> str:
    """Format: what is wrong / the text / a caret under ``index`` / what to do."""
    if index is None:
        first_line = text.split("\n", 1)[0]
        shown, _ = _shown_line(first_line, None)
        if "\n" in text:
            shown += " ..."
        return f"{name}: {what}\n{shown}\n{todo}"
    lineno, col, line = _locate(text, index)
    where = f"character {col + 1}" if "\n" not in text else f"line {lineno}, character {col + 1}"
    shown, caret = _shown_line(line, col)
    return f"{name}: {what} at {where}\n{shown}\n{caret}\n{todo}"


def _fail(name: str, what: str, text: str, index: int | None, todo: str) -> NoReturn:
    raise InputError(_message(name, what, text, index, todo))


# ----------------------------------------------------------------------------
# reading the text
# ----------------------------------------------------------------------------


class _Source:
    """The text as written, the text given to the parser, and the map between.

    ``parsed`` is the text without leading white space and with every ``^``
    operator replaced by ``**``; ``origin[i]`` is the index in ``text`` of the
    character ``parsed[i]`` came from.
    """

    def __init__(self, text: str, lead: int, carets: list[int]):
        self.text = text
        body = text[lead:]
        parts: list[str] = []
        origin: list[int] = []
        caret_set = set(carets)
        for i, ch in enumerate(body):
            if i in caret_set:
                parts.append("**")
                origin.extend((lead + i, lead + i))
            else:
                parts.append(ch)
                origin.append(lead + i)
        origin.append(lead + len(body))
        self.parsed = "".join(parts)
        self.origin = origin
        self.line_starts = [0] + [i + 1 for i, c in enumerate(self.parsed) if c == "\n"]

    def index(self, lineno: int | None, col: int | None) -> int:
        """Index in the text as written of parser position (line from 1, column from 0)."""
        if lineno is None:
            return 0
        lineno = max(1, min(lineno, len(self.line_starts)))
        pos = self.line_starts[lineno - 1] + max(0, col or 0)
        pos = min(pos, len(self.parsed))
        return self.origin[pos]

    def node_index(self, node: ast.AST) -> int:
        return self.index(getattr(node, "lineno", None), getattr(node, "col_offset", 0))

    def end_index(self, node: ast.AST) -> int:
        return self.index(getattr(node, "end_lineno", None), getattr(node, "end_col_offset", 0))

    def operator_index(self, left: ast.AST, right: ast.AST) -> int:
        """Index of the first operator character between two operands."""
        start, stop = self.end_index(left), self.node_index(right)
        for i in range(start, stop):
            if self.text[i] not in " \t\n\\()":
                return i
        return start


def _scan_tokens(name: str, text: str, lead: int) -> list[int]:
    """Check the token stream; return the indices (in ``text[lead:]``) of ``^`` operators.

    The scan stops quietly at the first token the tokenizer cannot read: the
    parser then reports that spot with its own message.
    """
    body = text[lead:]
    line_starts = [0] + [i + 1 for i, c in enumerate(body) if c == "\n"]
    carets: list[int] = []
    depth = 0
    tokens = tokenize.generate_tokens(io.StringIO(body).readline)
    while True:
        try:
            tok = next(tokens)
        except (StopIteration, tokenize.TokenError, SyntaxError, ValueError):
            break
        if tok.type == tokenize.ERRORTOKEN:
            break
        row, col = tok.start
        if row > len(line_starts):
            break
        where = lead + line_starts[row - 1] + col
        if tok.type == tokenize.COMMENT:
            _fail(
                name, "comments ('#') are not allowed", text, where,
                "remove the comment; in a problem file, put it after the value",
            )
        if tok.type != tokenize.OP:
            continue
        if tok.string == "^":
            carets.append(where - lead)
        elif tok.string == ";":
            _fail(
                name, "more than one statement (';') is not allowed", text, where,
                "write a single formula",
            )
        elif tok.string == ":=":
            _fail(name, "assignment with ':=' is not allowed", text, where, _GRAMMAR_HINT)
        elif tok.string == "=" and depth == 0:  # inside brackets: a keyword argument
            _fail(
                name, "assignment with '=' is not allowed", text, where,
                "to compare two values write ==; to name a value, pass it in constants",
            )
        elif tok.string in ("(", "[", "{"):
            depth += 1
            if depth > MAX_DEPTH:
                _fail(
                    name, f"brackets are nested deeper than {MAX_DEPTH} levels", text,
                    where, "simplify the formula or split it into named constants",
                )
        elif tok.string in (")", "]", "}"):
            depth -= 1
    return carets


def _check_characters(name: str, text: str) -> None:
    for i, ch in enumerate(text):
        if ch in "\t\n" or " " <= ch <= "~":
            continue
        if ord(ch) < 32 or ord(ch) == 127:
            _fail(
                name, f"control character {ch!r} is not allowed", text, i,
                "remove it; only printable characters, spaces, tabs and line breaks may appear",
            )
        hint = _CHARACTER_HINTS.get(ch, "use ASCII letters, digits and the operators + - * / ^")
        _fail(name, f"character {ch!r} is not allowed (only ASCII)", text, i, hint)


def _count_and_depth(name: str, src: _Source, tree: ast.Expression) -> None:
    """Refuse trees with too many parts or too deep a nesting (iteratively)."""
    count = sum(
        1 for node in ast.walk(tree) if isinstance(node, (ast.expr, ast.keyword, ast.comprehension))
    )
    if count > MAX_NODES:
        _fail(
            name, f"the expression has {count} parts; the limit is {MAX_NODES}", src.text,
            src.node_index(tree.body), "simplify the formula or split it into named constants",
        )
    stack = [(tree.body, 1)]
    while stack:
        node, depth = stack.pop()
        if depth > MAX_DEPTH:
            _fail(
                name, f"the expression nests deeper than {MAX_DEPTH} levels", src.text,
                src.node_index(node), "simplify the formula or split it into named constants",
            )
        for child in ast.iter_child_nodes(node):
            if not isinstance(child, (ast.expr, ast.keyword, ast.comprehension)):
                continue
            same_chain = (
                isinstance(node, ast.BinOp)
                and child is node.left
                and isinstance(child, ast.BinOp)
                and _chain_kind(child.op) is not None
                and _chain_kind(child.op) == _chain_kind(node.op)
            )
            stack.append((child, depth if same_chain else depth + 1))


def _chain_kind(op: ast.operator) -> str | None:
    if isinstance(op, (ast.Add, ast.Sub)):
        return "sum"
    if isinstance(op, (ast.Mult, ast.Div)):
        return "product"
    return None


# ----------------------------------------------------------------------------
# building closures
# ----------------------------------------------------------------------------

_Fn = Callable[[np.ndarray], object]


class _Part:
    """A compiled piece: ``fn(points)`` and, when it uses no coordinate, its value."""

    __slots__ = ("fn", "value")

    def __init__(self, fn: _Fn, value=None):
        self.fn = fn
        self.value = value


def _constant(value) -> _Part:
    v = np.float64(value)
    return _Part(lambda X: v, v)


def _truth(v):
    return np.not_equal(v, 0.0)


def _as_float(v):
    return np.asarray(v, dtype=np.float64)


# Node classes accepted, and the _Builder method that compiles each.
_ACCEPTED = {
    ast.Constant: "build_constant",
    ast.Name: "build_name",
    ast.BinOp: "build_binop",
    ast.UnaryOp: "build_unary",
    ast.Compare: "build_compare",
    ast.BoolOp: "build_boolop",
    ast.IfExp: "build_ifexp",
    ast.Call: "build_call",
}


class _Builder:
    """Walks a parsed tree once and turns each accepted node into a closure."""

    def __init__(self, name: str, src: _Source, coordinates: tuple[str, ...],
                 constants: dict[str, float]):
        self.name = name
        self.src = src
        self.coordinates = coordinates
        self.constants = constants
        self.variables: set[str] = set()

    # -- errors --------------------------------------------------------------
    def fail_at(self, index: int, what: str, todo: str = _GRAMMAR_HINT) -> NoReturn:
        _fail(self.name, what, self.src.text, index, todo)

    def fail(self, node: ast.AST, what: str, todo: str = _GRAMMAR_HINT) -> NoReturn:
        self.fail_at(self.src.node_index(node), what, todo)

    def allowed_names_line(self) -> str:
        names = list(self.coordinates) + list(_BUILTIN_CONSTANTS) + sorted(
            k for k in self.constants if k not in _BUILTIN_CONSTANTS
        )
        return "allowed names: " + ", ".join(names) + "; " + _ALLOWED_FUNCTIONS_LINE

    # -- folding -------------------------------------------------------------
    @staticmethod
    def fold(parts: list[_Part], fn: _Fn) -> _Part:
        """Evaluate ``fn`` once now when none of ``parts`` uses a coordinate."""
        if all(p.value is not None for p in parts):
            with np.errstate(all="ignore"):
                return _constant(fn(None))
        return _Part(fn)

    # -- dispatch ------------------------------------------------------------
    def build(self, node: ast.AST) -> _Part:
        """Whitelist dispatch: node classes not in ``_ACCEPTED`` are refused."""
        method = _ACCEPTED.get(type(node))
        if method is not None:
            return getattr(self, method)(node)
        what, todo = _REFUSED_NODES.get(type(node), ("this construct is not allowed",
                                                     _GRAMMAR_HINT))
        self.fail(node, what, todo)

    def build_constant(self, node: ast.Constant) -> _Part:
        v = node.value
        if isinstance(v, bool) or v is None:
            self.fail(node, f"'{v}' is not allowed",
                      "write a number, or a comparison such as x > 0 for a condition")
        if isinstance(v, (str, bytes)):
            self.fail(node, "text strings are not allowed", "write a number or a formula, not text")
        if isinstance(v, complex):
            self.fail(node, "complex numbers are not allowed", "coefficients are real numbers")
        if v is Ellipsis:
            self.fail(node, "'...' is not allowed", _GRAMMAR_HINT)
        if not isinstance(v, (int, float)):
            self.fail(node, "this constant is not allowed", _GRAMMAR_HINT)
        try:
            f = float(v)
        except OverflowError:
            f = math.inf
        if not math.isfinite(f):
            self.fail(node, "number is too large for a float64",
                      "write a number of magnitude below about 1.8e308")
        return _constant(f)

    def build_name(self, node: ast.Name) -> _Part:
        ident = node.id
        if ident in self.coordinates:
            self.variables.add(ident)
            row = self.coordinates.index(ident)
            return _Part(lambda X: X[row])
        if ident in _COORDINATES:
            dim = len(self.coordinates)
            self.fail(
                node, f"coordinate '{ident}' is not available in dimension {dim}",
                f"in dimension {dim} the coordinates are {', '.join(self.coordinates)}",
            )
        if ident in self.constants:
            return _constant(self.constants[ident])
        if ident in _FUNCTIONS:
            self.fail(node, f"function '{ident}' is used without arguments",
                      f"write {ident}(...) with its argument in brackets")
        hint = _NAME_HINTS.get(ident)
        if hint is None:
            known = list(self.coordinates) + list(self.constants) + list(_FUNCTIONS)
            lower = [k for k in known if k.lower() == ident.lower()]
            close = lower or difflib.get_close_matches(ident, known, n=1)
            if close:
                hint = f"did you mean '{close[0]}'? (names are case-sensitive)"
        todo = self.allowed_names_line()
        if hint:
            todo = hint + "\n" + todo
        self.fail(node, f"unknown name '{ident}'", todo)

    def build_binop(self, node: ast.BinOp) -> _Part:
        kind = _chain_kind(node.op)
        if kind is not None:
            # Flatten a left-leaning chain a + b - c ... into one loop, so that
            # long sums and products neither recurse deeply nor nest closures.
            ops: list[ast.operator] = []
            operands: list[ast.AST] = []
            cur: ast.AST = node
            while isinstance(cur, ast.BinOp) and _chain_kind(cur.op) == kind:
                ops.append(cur.op)
                operands.append(cur.right)
                cur = cur.left
            operands.append(cur)
            ops.reverse()
            operands.reverse()
            parts = [self.build(o) for o in operands]
            first = parts[0].fn
            if kind == "sum":
                steps = [(isinstance(op, ast.Add), p.fn) for op, p in zip(ops, parts[1:])]

                def chain(X, first=first, steps=steps):
                    acc = first(X)
                    for plus, fn in steps:
                        acc = acc + fn(X) if plus else acc - fn(X)
                    return acc
            else:
                steps = [(isinstance(op, ast.Mult), p.fn) for op, p in zip(ops, parts[1:])]

                def chain(X, first=first, steps=steps):
                    acc = first(X)
                    for times, fn in steps:
                        acc = acc * fn(X) if times else acc / fn(X)
                    return acc
            return self.fold(parts, chain)
        if isinstance(node.op, ast.Pow):
            base, power = self.build(node.left), self.build(node.right)
            fb, fp = base.fn, power.fn
            return self.fold([base, power], lambda X: np.power(fb(X), fp(X)))
        symbol = _REFUSED_OPERATORS.get(type(node.op), "?")
        where = self.src.operator_index(node.left, node.right)
        todo = "operators allowed: + - * / ^ ** and the comparisons < <= > >= == !="
        if symbol == "%":
            todo += "; there is no remainder operator"
        elif symbol == "//":
            todo += "; for a rounded-down quotient write floor(a / b)"
        elif symbol == "^":
            todo += "; write ** for a power here"
        self.fail_at(where, f"operator '{symbol}' is not allowed", todo)

    def build_unary(self, node: ast.UnaryOp) -> _Part:
        if isinstance(node.op, ast.Invert):
            self.fail(node, "operator '~' is not allowed",
                      "for a logical negation write 'not', for a sign change write -")
        operand = self.build(node.operand)
        f = operand.fn
        if isinstance(node.op, ast.USub):
            return self.fold([operand], lambda X: -f(X))
        if isinstance(node.op, ast.UAdd):
            return operand
        return self.fold([operand], lambda X: _as_float(np.equal(f(X), 0.0)))  # not

    def build_compare(self, node: ast.Compare) -> _Part:
        operands = [node.left, *node.comparators]
        ufuncs = []
        for i, op in enumerate(node.ops):
            ufunc = _COMPARISONS.get(type(op))
            if ufunc is None:
                word = {ast.Is: "is", ast.IsNot: "is not", ast.In: "in", ast.NotIn: "not in"}.get(
                    type(op), "?")
                self.fail_at(
                    self.src.operator_index(operands[i], operands[i + 1]),
                    f"comparison '{word}' is not allowed",
                    "compare numbers with < <= > >= == !=",
                )
            ufuncs.append(ufunc)
        parts = [self.build(o) for o in operands]
        fns = [p.fn for p in parts]

        def compare(X):
            a = fns[0](X)
            result = None
            for ufunc, fn in zip(ufuncs, fns[1:]):
                b = fn(X)
                r = ufunc(a, b)
                result = r if result is None else np.logical_and(result, r)
                a = b
            return _as_float(result)

        return self.fold(parts, compare)

    def build_boolop(self, node: ast.BoolOp) -> _Part:
        parts = [self.build(v) for v in node.values]
        fns = [p.fn for p in parts]
        combine = np.logical_and if isinstance(node.op, ast.And) else np.logical_or

        def boolop(X):
            return _as_float(reduce(combine, [_truth(fn(X)) for fn in fns]))

        return self.fold(parts, boolop)

    def build_ifexp(self, node: ast.IfExp) -> _Part:
        test, body, orelse = self.build(node.test), self.build(node.body), self.build(node.orelse)
        ft, fb, fo = test.fn, body.fn, orelse.fn
        return self.fold(
            [test, body, orelse],
            lambda X: _as_float(np.where(_truth(ft(X)), fb(X), fo(X))),
        )

    def build_call(self, node: ast.Call) -> _Part:
        func = node.func
        if not isinstance(func, ast.Name):
            if isinstance(func, ast.Attribute):
                self.fail(func, "attribute access with '.' is not allowed",
                          "call a function by its plain name; " + _ALLOWED_FUNCTIONS_LINE)
            self.fail(node, "only the listed functions can be called, by name",
                      _ALLOWED_FUNCTIONS_LINE)
        ident = func.id
        if ident not in _FUNCTIONS:
            if ident in self.coordinates or ident in self.constants or ident in _COORDINATES:
                self.fail(node, f"'{ident}' is not a function",
                          f"write {ident}*(...) for a product; " + _ALLOWED_FUNCTIONS_LINE)
            hint = _NAME_HINTS.get(ident)
            if hint is None:
                close = difflib.get_close_matches(ident, list(_FUNCTIONS), n=1)
                hint = f"did you mean '{close[0]}'?" if close else None
            todo = _ALLOWED_FUNCTIONS_LINE if hint is None else f"{hint}\n{_ALLOWED_FUNCTIONS_LINE}"
            self.fail(node, f"function '{ident}' is not allowed", todo)
        if node.keywords:
            kw = node.keywords[0]
            self.fail(kw, "keyword arguments are not allowed",
                      f"pass the arguments of {ident}(...) by position")
        for arg in node.args:
            if isinstance(arg, ast.Starred):
                self.fail(arg, "starred arguments (*...) are not allowed",
                          "pass each argument on its own, for example max(x, y, 0)")
        impl, least, most = _FUNCTIONS[ident]
        n = len(node.args)
        if n < least or (most is not None and n > most):
            if most is None:
                wanted = f"{least} or more arguments"
            else:
                wanted = f"{least} argument" + ("s" if least != 1 else "")
            usage = {1: "a", 2: "b, a" if ident == "atan2" else "a, b"}[least]
            if most is None:
                usage += ", ..."
            self.fail(node, f"function '{ident}' takes {wanted}, got {n}",
                      f"write {ident}({usage})")
        parts = [self.build(a) for a in node.args]
        fns = [p.fn for p in parts]
        if len(fns) == 1:
            f0 = fns[0]
            return self.fold(parts, lambda X: impl(f0(X)))
        return self.fold(parts, lambda X: impl(*[fn(X) for fn in fns]))


# ----------------------------------------------------------------------------
# public API
# ----------------------------------------------------------------------------


class Expression:
    """A compiled coefficient: call it on points to get its values.

    Made by :func:`compile_expression`; not meant to be constructed directly.

    Attributes
    ----------
    text : str
        The text it was compiled from.
    name : str
        The name used in messages (for example ``"source"``).
    dim : int or None
        The dimension given at compile time, or None when any is accepted.
    variables : frozenset of str
        The coordinates (``"x"``, ``"y"``, ``"z"``) that appear in the text.
    is_constant : bool
        True when no coordinate appears.
    value : float or None
        The value when constant, else None.

    Examples
    --------
    >>> import numpy as np
    >>> k = compile_expression("1 + x^2", dim=2, name="conductivity")
    >>> k(np.array([[0.0, 1.0, 2.0], [5.0, 5.0, 5.0]])).tolist()
    [1.0, 2.0, 5.0]
    >>> sorted(k.variables), k.is_constant, k.value
    (['x'], False, None)
    """

    __slots__ = ("text", "name", "dim", "variables", "is_constant", "value",
                 "_fn", "_rows", "_constants")

    def __init__(self, text, name, dim, variables, value, fn, constants):
        self.text = text
        self.name = name
        self.dim = dim
        self.variables = frozenset(variables)
        self.is_constant = value is not None
        self.value = None if value is None else float(value)
        self._fn = fn
        self._rows = max((_COORDINATES.index(v) + 1 for v in self.variables), default=1)
        self._constants = dict(constants)

    def __repr__(self) -> str:
        dim = "" if self.dim is None else f", dim={self.dim}"
        return f"Expression({self.text!r}, name={self.name!r}{dim})"

    def __reduce__(self):
        return (_rebuild, (self.text, self.dim, self.name, self._constants))

    def _points(self, x) -> np.ndarray:
        def bad(what: str, todo: str):
            _fail(self.name, what, self.text, None, todo)

        shape_word = "(dim, n)" if self.dim is None else f"({self.dim}, n)"
        try:
            arr = np.asarray(x)
        except (TypeError, ValueError) as exc:
            bad(f"the points array cannot be read as an array ({exc})",
                f"pass a float array of shape {shape_word}")
        if arr.dtype.kind not in "iuf":
            bad(f"the points array must hold real numbers, got dtype {arr.dtype}",
                f"pass a float array of shape {shape_word}")
        if arr.ndim != 2:
            bad(f"the points array must be 2-D of shape {shape_word}, got shape {arr.shape}",
                "for points with one coordinate use x.reshape(1, -1)")
        rows = arr.shape[0]
        if not 1 <= rows <= 3:
            bad(f"the points array must have 1, 2 or 3 rows (one per coordinate), "
                f"got shape {arr.shape}",
                "if each row is a point, pass the transpose x.T")
        if self.dim is not None and rows != self.dim:
            bad(f"the points array must have {self.dim} rows for this {self.dim}-D expression, "
                f"got shape {arr.shape}", f"pass an array of shape ({self.dim}, n)")
        if rows < self._rows:
            used = ", ".join(sorted(self.variables))
            bad(f"the expression uses {used} but the points array has only {rows} "
                f"row{'s' if rows != 1 else ''} (shape {arr.shape})",
                f"pass an array with at least {self._rows} rows")
        arr = np.asarray(arr, dtype=np.float64)
        finite = np.isfinite(arr).all(axis=0)
        if not finite.all():
            i = int(np.flatnonzero(~finite)[0])
            bad(f"the points array holds a non-finite coordinate at point {i} "
                f"({self._coordinates_text(arr, i)})", "pass finite coordinates")
        return arr

    @staticmethod
    def _coordinates_text(arr: np.ndarray, i: int) -> str:
        return ", ".join(f"{_COORDINATES[r]}={float(arr[r, i])!r}" for r in range(arr.shape[0]))

    def __call__(self, x) -> np.ndarray:
        """Evaluate at points.

        Parameters
        ----------
        x : array_like, shape (dim, n)
            Coordinates, one row per coordinate and one column per point.

        Returns
        -------
        ndarray of float64, shape (n,)
            A new array; constants are broadcast to every point.

        Raises
        ------
        InputError
            If ``x`` has the wrong shape or dtype or non-finite entries, or if
            the value is NaN or infinite at some point (for example ``log(x)``
            at ``x <= 0``); the message names the first such point.
        """
        X = self._points(x)
        n = X.shape[1]
        if self.value is not None:
            return np.full(n, self.value, dtype=np.float64)
        out = np.empty(n, dtype=np.float64)
        with np.errstate(all="ignore"):
            out[...] = self._fn(X)
        finite = np.isfinite(out)
        if not finite.all():
            bad = np.flatnonzero(~finite)
            i = int(bad[0])
            _fail(
                self.name,
                f"the value is not finite ({out[i]}) at {bad.size} of {n} points; the first is "
                f"point {i} at ({self._coordinates_text(X, i)})",
                self.text, None,
                "make sure the formula is defined on the whole domain: log needs positive "
                "arguments, sqrt non-negative ones, a divisor must not be zero, and exp "
                "overflows above about 709",
            )
        return out


def _rebuild(text, dim, name, constants):
    return compile_expression(text, dim=dim, name=name, constants=constants)


def _check_constants(name: str, text: str, constants) -> dict[str, float]:
    if constants is None:
        return {}
    if not isinstance(constants, Mapping):
        _fail(name, f"constants must be a mapping of name to number, got "
              f"{type(constants).__name__}", text, None, "pass a dict such as {'k0': 2.5}")
    checked: dict[str, float] = {}
    for key, val in constants.items():
        if not isinstance(key, str) or not key.isidentifier() or keyword.iskeyword(key) \
                or not key.isascii():
            _fail(name, f"constant name {key!r} is not a valid name", text, None,
                  "use ASCII letters, digits and underscores, not starting with a digit")
        if key in _COORDINATES:
            _fail(name, f"constant name {key!r} would hide the coordinate {key}", text, None,
                  "choose another name for the constant")
        if key in _FUNCTIONS:
            _fail(name, f"constant name {key!r} would hide the function {key}", text, None,
                  "choose another name for the constant")
        if key in _BUILTIN_CONSTANTS:
            _fail(name, f"constant name {key!r} would hide the built-in constant {key}", text,
                  None, "choose another name for the constant")
        if isinstance(val, (bool, np.bool_)) or not isinstance(val, numbers.Real):
            _fail(name, f"constant {key!r} must be a real number, got {type(val).__name__}",
                  text, None, "pass an int or a float")
        f = float(val)
        if not math.isfinite(f):
            _fail(name, f"constant {key!r} is not finite ({f})", text, None,
                  "pass a finite number")
        checked[key] = f
    return checked


def compile_expression(text, *, dim=None, name="expression", constants=None) -> Expression:
    """Read a coefficient written in math notation and return a vectorised callable.

    Parameters
    ----------
    text : str or int or float
        The formula, for example ``"1 + 0.5*sin(pi*x)*y^2"``; see the module
        documentation for the grammar and the functions.  A number gives a
        constant expression.
    dim : {1, 2, 3} or None, optional
        Spatial dimension.  With ``dim=2`` the text may use ``x`` and ``y``
        but not ``z``; with None every coordinate is accepted and the number
        of rows of the points is checked at call time.
    name : str, optional
        What the coefficient is (``"source"``, ``"conductivity"``, a file
        key); every error message starts with it.
    constants : mapping of str to float, optional
        Extra named constants.  Names must be ASCII identifiers and must not
        be ``x``, ``y``, ``z``, ``pi``, ``e`` or a function name.

    Returns
    -------
    Expression
        Callable on points of shape ``(dim, n)``, returning float64 values of
        shape ``(n,)``.

    Raises
    ------
    InputError
        If the text breaks the grammar or a limit, or an argument is invalid.
        The message names the coefficient, shows the text with a caret under
        the offending character and says what to write instead.

    Examples
    --------
    >>> import numpy as np
    >>> f = compile_expression("2^3^2 - x", dim=1, name="source")
    >>> f(np.array([[0.0, 12.0]])).tolist()
    [512.0, 500.0]
    >>> g = compile_expression("k0 if x < 0.5 else 2*k0", constants={"k0": 3.0})
    >>> g(np.array([[0.25, 0.75]])).tolist()
    [3.0, 6.0]
    >>> compile_expression("-2^2").value
    -4.0
    >>> try:
    ...     compile_expression("sin(x) + t", dim=2, name="source")
    ... except InputError as err:
    ...     print("\\n".join(str(err).splitlines()[:3]))
    source: unknown name 't' at character 10
        sin(x) + t
                 ^
    """
    name = str(name)
    if isinstance(text, (bool, np.bool_)):
        raise InputError(f"{name}: the expression must be a string or a number, got {text!r}\n"
                         "write a number such as 1.0 or a formula such as 'sin(pi*x)'")
    if isinstance(text, numbers.Real) and not isinstance(text, str):
        if isinstance(text, numbers.Integral):
            text = str(int(text))
        else:
            f = float(text)
            if not math.isfinite(f):
                raise InputError(f"{name}: the value {f} is not finite\npass a finite number")
            text = repr(f)
    if not isinstance(text, str):
        raise InputError(f"{name}: the expression must be a string or a number, got "
                         f"{type(text).__name__}\n"
                         "write a number such as 1.0 or a formula such as 'sin(pi*x)'")
    if dim is not None:
        if isinstance(dim, (bool, np.bool_)) or not isinstance(dim, numbers.Integral) \
                or int(dim) not in (1, 2, 3):
            raise InputError(f"{name}: dim must be 1, 2, 3 or None, got {dim!r}\n"
                             "pass the spatial dimension of the mesh")
        dim = int(dim)
    user = _check_constants(name, text, constants)
    original = text
    text = text.replace("\r\n", "\n").replace("\r", "\n")
    if len(text) > MAX_LENGTH:
        _fail(name, f"the expression is {len(text)} characters long; the limit is {MAX_LENGTH}",
              text, MAX_LENGTH, "shorten the formula or split it into named constants")
    _check_characters(name, text)
    stripped = text.lstrip()
    if not stripped.strip():
        _fail(name, "the expression is empty", text, 0,
              "write a number such as 1.0 or a formula such as sin(pi*x)")
    lead = len(text) - len(stripped)
    carets = _scan_tokens(name, text, lead)
    src = _Source(text, lead, carets)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            tree = ast.parse(src.parsed, mode="eval")
    except SyntaxError as exc:
        reason = exc.msg or "invalid syntax"
        # An offset of 0 or None means the parser ran off the end of the text.
        where = src.index(exc.lineno, exc.offset - 1) if exc.offset else len(text)
        _fail(name, f"cannot read the expression ({reason})", text, where,
              "check brackets and operators; write products explicitly, e.g. 2*x, "
              "and powers as x^2 or x**2")
    except (ValueError, RecursionError, MemoryError) as exc:  # pragma: no cover - defensive
        _fail(name, f"cannot read the expression ({type(exc).__name__})", text, 0,
              "simplify the formula")
    _count_and_depth(name, src, tree)
    coordinates = _COORDINATES if dim is None else _COORDINATES[:dim]
    builder = _Builder(name, src, coordinates, {**_BUILTIN_CONSTANTS, **user})
    part = builder.build(tree.body)
    if part.value is not None:
        value = float(part.value)
        if not math.isfinite(value):
            _fail(name, f"the expression evaluates to {value}", text, None,
                  "make sure the formula is defined: log needs positive arguments, sqrt "
                  "non-negative ones, a divisor must not be zero, and exp overflows above "
                  "about 709")
        return Expression(original, name, dim, builder.variables, value, part.fn, user)
    return Expression(original, name, dim, builder.variables, None, part.fn, user)
