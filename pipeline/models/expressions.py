"""A small, safe expression language for propensities, evaluated with numpy over states.

Text is parsed with :mod:`ast` and only a whitelist of node types is accepted: numbers,
names (species counts and parameters), ``+ - * / **``, unary minus, and calls of
``exp log sqrt abs min max hill``, where ``hill(x, K, n) = x^n / (K^n + x^n)``. Nothing is
ever passed to ``eval`` or ``exec``; an unknown name or construct is a one-line error naming
the field.
"""

from __future__ import annotations

import ast
from collections.abc import Callable, Iterable
from typing import Any

import numpy as np

from pipeline.errors import ConfigError

__all__ = ["FUNCTIONS", "Expression"]


def _hill(x: Any, K: Any, n: Any) -> Any:
    power = np.power(x, n)
    return power / (np.power(K, n) + power)


FUNCTIONS: dict[str, tuple[Callable[..., Any], tuple[int, ...]]] = {
    "exp": (np.exp, (1,)),
    "log": (np.log, (1,)),
    "sqrt": (np.sqrt, (1,)),
    "abs": (np.abs, (1,)),
    "min": (np.minimum, (2,)),
    "max": (np.maximum, (2,)),
    "hill": (_hill, (3,)),
}
_OPERATORS = {ast.Add: np.add, ast.Sub: np.subtract, ast.Mult: np.multiply,
              ast.Div: np.divide, ast.Pow: np.power}


class Expression:
    """A parsed expression over the names ``allowed``; call with ``{name: array}``."""

    def __init__(self, text: str, allowed: Iterable[str], label: str) -> None:
        self.text, self.label = text, label
        allowed = set(allowed)
        try:
            tree = ast.parse(text.strip(), mode="eval")
        except SyntaxError as exc:
            raise ConfigError(f"{label}: cannot parse {text!r} ({exc.msg})") from None
        self.names: set[str] = set()
        self._check(tree.body, allowed)
        self.tree = tree.body

    def _check(self, node: ast.AST, allowed: set[str]) -> None:
        if isinstance(node, ast.Constant):
            if isinstance(node.value, bool) or not isinstance(node.value, int | float):
                raise ConfigError(f"{self.label}: {node.value!r} is not a number")
        elif isinstance(node, ast.Name):
            if node.id not in allowed:
                raise ConfigError(f"{self.label}: unknown name {node.id!r} in {self.text!r}; "
                                  "known: " + ", ".join(sorted(allowed)))
            self.names.add(node.id)
        elif isinstance(node, ast.BinOp) and type(node.op) in _OPERATORS:
            self._check(node.left, allowed)
            self._check(node.right, allowed)
        elif isinstance(node, ast.UnaryOp) and isinstance(node.op, ast.USub | ast.UAdd):
            self._check(node.operand, allowed)
        elif isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
            name = node.func.id
            if name not in FUNCTIONS:
                raise ConfigError(f"{self.label}: unknown function {name!r}; allowed: "
                                  + ", ".join(FUNCTIONS))
            if node.keywords or len(node.args) not in FUNCTIONS[name][1]:
                raise ConfigError(f"{self.label}: {name} takes {FUNCTIONS[name][1][0]} "
                                  "positional arguments")
            for argument in node.args:
                self._check(argument, allowed)
        else:
            raise ConfigError(f"{self.label}: {type(node).__name__} is not allowed in "
                              f"{self.text!r}; use numbers, names, + - * / ** and "
                              + ", ".join(FUNCTIONS))

    def __call__(self, values: dict[str, Any]) -> Any:
        with np.errstate(all="ignore"):
            return self._evaluate(self.tree, values)

    def _evaluate(self, node: ast.AST, values: dict[str, Any]) -> Any:
        if isinstance(node, ast.Constant):
            return float(node.value)
        if isinstance(node, ast.Name):
            return values[node.id]
        if isinstance(node, ast.BinOp):
            return _OPERATORS[type(node.op)](self._evaluate(node.left, values),
                                             self._evaluate(node.right, values))
        if isinstance(node, ast.UnaryOp):
            operand = self._evaluate(node.operand, values)
            return -operand if isinstance(node.op, ast.USub) else operand
        function = FUNCTIONS[node.func.id][0]  # an ast.Call, checked in _check
        return function(*(self._evaluate(argument, values) for argument in node.args))
