"""Arithmetic expressions of the command tables (waveform scaling recipes, derived values):
``+ - * /``, unary signs, numbers and names, parsed with :mod:`ast` and evaluated without
``eval`` (nothing else is accepted)."""

from __future__ import annotations

import ast
import operator
from collections.abc import Mapping
from functools import lru_cache

_BINARY = {ast.Add: operator.add, ast.Sub: operator.sub, ast.Mult: operator.mul,
           ast.Div: operator.truediv}


@lru_cache(maxsize=512)
def _parse_expression(text: str) -> ast.Expression:
    tree = ast.parse(text, mode="eval")
    for node in ast.walk(tree):
        allowed = (ast.Expression, ast.BinOp, ast.UnaryOp, ast.USub, ast.UAdd, ast.Name,
                   ast.Load, ast.Constant, *_BINARY)
        if not isinstance(node, allowed):
            raise ValueError(f"not allowed in a table expression: {type(node).__name__}")
        if isinstance(node, ast.Constant) and not isinstance(node.value, int | float):
            raise ValueError("only numeric constants are allowed")
    return tree


def expression_names(text: str) -> set[str]:
    """Names an expression refers to."""
    return {n.id for n in ast.walk(_parse_expression(text)) if isinstance(n, ast.Name)}


def evaluate(text: str, names: Mapping[str, float]) -> float:
    """Evaluate a table expression (``+ - * /``, unary signs, numbers, names) safely."""

    def walk(node: ast.AST) -> float:
        if isinstance(node, ast.Expression):
            return walk(node.body)
        if isinstance(node, ast.Constant):
            return float(node.value)
        if isinstance(node, ast.Name):
            if node.id not in names:
                raise KeyError(node.id)
            return float(names[node.id])
        if isinstance(node, ast.UnaryOp):
            value = walk(node.operand)
            return -value if isinstance(node.op, ast.USub) else value
        if isinstance(node, ast.BinOp):
            return _BINARY[type(node.op)](walk(node.left), walk(node.right))
        raise ValueError(f"unsupported expression node {type(node).__name__}")

    return walk(_parse_expression(text))
