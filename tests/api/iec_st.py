"""A small grammar check and interpreter of IEC 61131-3 Structured Text, for the export tests.

No general-purpose IEC 61131-3 parser that is not tied to one vendor's product was found on
the package index, so the tests check the generated function blocks with this grammar of
their own, written for ``lark`` (a general parser library on PyPI) after the syntax of
IEC 61131-3 (edition 3) as recalled from memory: a FUNCTION_BLOCK with VAR_INPUT,
VAR_OUTPUT, VAR and VAR CONSTANT sections of declarations ``name : TYPE [:= literal];``,
assignment and IF/ELSIF/ELSE statements, expressions of the standard's operators with their
precedence (unary minus and NOT; * /; + -; comparisons; AND; XOR; OR), real literals with
digits on both sides of the point and an optional exponent, keywords in any case and
``(* ... *)`` comments.  Identifiers are a letter or underscore then letters, digits and
underscores, with no two underscores in a row and no trailing underscore.

:class:`FunctionBlock` checks what a compiler would (every name declared once without regard
to case, no keyword as a name, no assignment to an input or a constant, BOOL conditions) and
runs the block call by call, keeping its VAR and VAR_OUTPUT values between calls, in IEEE
double arithmetic (LREAL).
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

from lark import Lark, Token, Tree

GRAMMAR = r"""
start: function_block

function_block: "FUNCTION_BLOCK"i NAME var_block* statement* "END_FUNCTION_BLOCK"i

var_block: var_kind declaration* "END_VAR"i
var_kind: VAR_INPUT | VAR_OUTPUT | VAR_CONSTANT | VAR_PLAIN
VAR_INPUT.2: /VAR_INPUT\b/i
VAR_OUTPUT.2: /VAR_OUTPUT\b/i
VAR_CONSTANT.2: /VAR\s+CONSTANT\b/i
VAR_PLAIN.1: /VAR\b/i

declaration: NAME ":" TYPE (":=" constant)? ";"
?constant: literal | "-" literal -> negate | "+" literal
TYPE.2: /(LREAL|REAL|BOOL|INT|DINT)\b/i

?statement: assignment | if_statement
assignment: NAME ":=" expr ";"
if_statement: "IF"i expr "THEN"i statement* elsif_part* else_part? "END_IF"i ";"
elsif_part: "ELSIF"i expr "THEN"i statement*
else_part: "ELSE"i statement*

?expr: or_expr
?or_expr: xor_expr | or_expr "OR"i xor_expr -> or_op
?xor_expr: and_expr | xor_expr "XOR"i and_expr -> xor_op
?and_expr: comparison | and_expr ("AND"i | "&") comparison -> and_op
?comparison: sum | sum COMPARE sum -> compare
?sum: product | sum ADD product -> binary
?product: unary | product MUL unary -> binary
?unary: primary | "-" unary -> negate | "NOT"i unary -> not_op
?primary: literal | NAME -> variable | "(" expr ")"
?literal: REAL_LITERAL -> real | INTEGER_LITERAL -> integer | TRUE -> true | FALSE -> false

TRUE.2: /TRUE\b/i
FALSE.2: /FALSE\b/i
COMPARE: "<=" | ">=" | "<>" | "<" | ">" | "="
ADD: "+" | "-"
MUL: "*" | "/"
REAL_LITERAL: /[0-9](_?[0-9])*\.[0-9](_?[0-9])*([eE][+-]?[0-9](_?[0-9])*)?/
INTEGER_LITERAL: /[0-9](_?[0-9])*/
NAME: /[A-Za-z_][A-Za-z0-9_]*/
COMMENT: /\(\*(.|\n)*?\*\)/

%import common.WS
%ignore WS
%ignore COMMENT
"""

#: Reserved words that may not name a variable (IEC 61131-3 keywords, recalled from memory).
RESERVED = frozenset(
    [
        "AND",
        "BOOL",
        "DINT",
        "ELSE",
        "ELSIF",
        "END_FUNCTION_BLOCK",
        "END_IF",
        "END_VAR",
        "FALSE",
        "FOR",
        "FUNCTION",
        "FUNCTION_BLOCK",
        "IF",
        "INT",
        "LREAL",
        "MOD",
        "NOT",
        "OR",
        "REAL",
        "THEN",
        "TRUE",
        "VAR",
        "VAR_INPUT",
        "VAR_OUTPUT",
        "XOR",
        "CONSTANT",
        "WHILE",
        "REPEAT",
        "CASE",
    ]
)

PARSER = Lark(GRAMMAR, parser="lalr", maybe_placeholders=False)


class CheckError(Exception):
    """The text breaks a rule a compiler would enforce."""


@dataclass
class Variable:
    kind: str  # "input", "output", "local", "constant"
    type: str  # "LREAL", "BOOL", ...
    value: Any


def _identifier_ok(name: str) -> bool:
    return (
        re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", name) is not None
        and "__" not in name
        and not name.endswith("_")
        and name.upper() not in RESERVED
    )


class FunctionBlock:
    """A parsed and checked function block, run call by call (module notes)."""

    def __init__(self, text: str) -> None:
        tree = PARSER.parse(text)
        block = tree.children[0]
        self.name = str(block.children[0])
        self.variables: dict[str, Variable] = {}
        self.statements: list[Tree] = []
        kinds = {"VAR_INPUT": "input", "VAR_OUTPUT": "output", "VAR": "local"}
        for child in block.children[1:]:
            if isinstance(child, Tree) and child.data == "var_block":
                kind_token = child.children[0].children[0]
                kind = "constant" if kind_token.type == "VAR_CONSTANT" else kinds[kind_token.type.replace("_PLAIN", "")]
                for decl in child.children[1:]:
                    self._declare(decl, kind)
            else:
                self.statements.append(child)
        for statement in self.statements:
            self._check(statement)

    # ------------------------------------------------------------------ checks
    def _declare(self, decl: Tree, kind: str) -> None:
        name, type_ = str(decl.children[0]), str(decl.children[1]).upper()
        if not _identifier_ok(name):
            raise CheckError(f"{name!r} is not a valid identifier")
        if name.upper() in self.variables:
            raise CheckError(f"{name!r} is declared twice")
        value: Any = False if type_ == "BOOL" else 0.0
        if len(decl.children) > 2:
            value = self._evaluate(decl.children[2], {})
            if (type_ == "BOOL") != isinstance(value, bool):
                raise CheckError(f"the initial value of {name!r} does not match its type {type_}")
        elif kind == "constant":
            raise CheckError(f"the constant {name!r} has no value")
        self.variables[name.upper()] = Variable(kind, type_, value)

    def _check(self, node: Tree) -> None:
        if node.data == "assignment":
            target = str(node.children[0]).upper()
            if target not in self.variables:
                raise CheckError(f"{node.children[0]!s} is not declared")
            if self.variables[target].kind in ("input", "constant"):
                raise CheckError(f"{node.children[0]!s} is an {self.variables[target].kind} and cannot be assigned")
            self._check_expression(node.children[1])
            return
        for child in node.children:
            if isinstance(child, Tree):
                if child.data in ("assignment", "if_statement", "elsif_part", "else_part"):
                    self._check(child)
                else:
                    self._check_expression(child)

    def _check_expression(self, node: Tree | Token) -> None:
        if isinstance(node, Token):
            return
        if node.data == "variable" and str(node.children[0]).upper() not in self.variables:
            raise CheckError(f"{node.children[0]!s} is not declared")
        for child in node.children:
            self._check_expression(child)

    # ------------------------------------------------------------------ running
    def _evaluate(self, node: Tree | Token, env: dict[str, Variable]) -> Any:
        kind = node.data
        c = node.children
        if kind == "real":
            return float(str(c[0]).replace("_", ""))
        if kind == "integer":
            return float(int(str(c[0]).replace("_", "")))
        if kind == "true":
            return True
        if kind == "false":
            return False
        if kind == "variable":
            return env[str(c[0]).upper()].value
        if kind == "negate":
            return -self._evaluate(c[0], env)
        if kind == "not_op":
            return not self._bool(self._evaluate(c[0], env))
        if kind == "binary":
            left, op, right = self._evaluate(c[0], env), str(c[1]), self._evaluate(c[2], env)
            return {"+": left + right, "-": left - right, "*": left * right}[op] if op != "/" else left / right
        if kind == "compare":
            left, op, right = self._evaluate(c[0], env), str(c[1]), self._evaluate(c[2], env)
            return {
                "<": left < right,
                ">": left > right,
                "<=": left <= right,
                ">=": left >= right,
                "=": left == right,
                "<>": left != right,
            }[op]
        if kind in ("and_op", "or_op", "xor_op"):
            a, b = self._bool(self._evaluate(c[0], env)), self._bool(self._evaluate(c[1], env))
            return {"and_op": a and b, "or_op": a or b, "xor_op": a != b}[kind]
        raise CheckError(f"unknown expression {kind}")  # pragma: no cover

    @staticmethod
    def _bool(value: Any) -> bool:
        if not isinstance(value, bool):
            raise CheckError("a condition is not BOOL")
        return value

    def _run(self, node: Tree) -> None:
        if node.data == "assignment":
            var = self.variables[str(node.children[0]).upper()]
            value = self._evaluate(node.children[1], self.variables)
            if (var.type == "BOOL") != isinstance(value, bool):
                raise CheckError(f"{node.children[0]!s} of type {var.type} is assigned {value!r}")
            var.value = value
            return
        assert node.data == "if_statement"
        branches: list[tuple[Tree | None, list[Tree]]] = []
        rest = node.children
        branches.append((rest[0], [s for s in rest[1:] if s.data not in ("elsif_part", "else_part")]))
        for part in rest[1:]:
            if part.data == "elsif_part":
                branches.append((part.children[0], list(part.children[1:])))
            elif part.data == "else_part":
                branches.append((None, list(part.children)))
        for condition, body in branches:
            if condition is None or self._bool(self._evaluate(condition, self.variables)):
                for statement in body:
                    self._run(statement)
                return

    def call(self, **inputs: Any) -> dict[str, Any]:
        """One call: set the inputs given (others keep their value), run, return every output by name."""
        for name, value in inputs.items():
            var = self.variables[name.upper()]
            if var.kind != "input":
                raise CheckError(f"{name} is not an input")
            var.value = value
        for statement in self.statements:
            self._run(statement)
        return {name: v.value for name, v in self.variables.items() if v.kind == "output"}

    def names(self, kind: str) -> list[str]:
        """The declared names of one kind (upper case, in declaration order)."""
        return [name for name, v in self.variables.items() if v.kind == kind]
