r"""Smooth functions of the parameters with delta-method intervals.

An estimate exists to answer a question in the units the question is asked in: a cost in
units of another cost (a money value :math:`\theta_k/\theta_{price}`), a ratio, an exponent.
For a smooth :math:`g:\mathbb R^p \to \mathbb R`,

.. math::

    \widehat{\mathrm{Var}}\,g(\hat\theta) = \nabla g(\hat\theta)'\,\hat V\,\nabla g(\hat\theta),

with :math:`\hat V` the estimate's own covariance (clustered by unit: the same influence
terms, so first-stage noise is accounted for exactly as in the parameters' intervals) and the
gradient by central differences (:func:`orthoccp._numeric.central_jacobian`). The interval is
:math:`g(\hat\theta) \pm z_{1-\alpha/2}\,\mathrm{se}`.

The delta method is a first-order approximation. It is poor where :math:`g` is far from
linear over the confidence region of :math:`\theta`: a ratio whose denominator is within a
few standard errors of zero (common practice: distrust a ratio interval when the
denominator's :math:`|z| < 3`; Fieller's interval is the exact alternative, not built here).
A function is checked for that case and a warning names it.

References
----------
Newey & McFadden (1994), Handbook of Econometrics vol. 4, ch. 36, §3 (delta method);
Fieller (1954), Journal of the Royal Statistical Society B 16 (ratios).
"""

from __future__ import annotations

import ast
import math
import warnings
from collections.abc import Callable, Mapping
from typing import Any, Union

import numpy as np
import pandas as pd
from scipy import stats

from ._errors import InputError, OrthoCCPWarning
from ._numeric import central_jacobian

__all__ = ["Function", "check_functions", "delta_method", "function_lines"]

Function = Union[str, Callable[[pd.Series], float]]
"""An expression over parameter names (``"wear_cost / swap_cost"``, with ``+ - * / **``,
numbers and ``exp``, ``log``, ``sqrt``), or a callable of the parameter Series."""

_CALLS: dict[str, Callable[[float], float]] = {"exp": math.exp, "log": math.log, "sqrt": math.sqrt}
_BINARY = {ast.Add: lambda a, b: a + b, ast.Sub: lambda a, b: a - b,
           ast.Mult: lambda a, b: a * b, ast.Div: lambda a, b: a / b,
           ast.Pow: lambda a, b: a ** b}


def _compile(name: str, text: str, parameters: list[str]) -> Callable[[pd.Series], float]:
    """A callable for an arithmetic expression over parameter names (nothing else evaluates)."""
    try:
        tree = ast.parse(text.strip(), mode="eval")
    except SyntaxError as exc:
        raise InputError(f"function {name!r}: {text!r} is not an expression ({exc.msg}).") from exc

    def walk(node: ast.AST) -> Callable[[Mapping[str, float]], float]:
        if isinstance(node, ast.Expression):
            return walk(node.body)
        if isinstance(node, ast.Constant) and isinstance(node.value, (int, float)) \
                and not isinstance(node.value, bool):
            value = float(node.value)
            return lambda th: value
        if isinstance(node, ast.Name):
            if node.id not in parameters:
                raise InputError(
                    f"function {name!r}: {node.id!r} is not a parameter (parameters: "
                    f"{', '.join(parameters)})."
                )
            key = node.id
            return lambda th: th[key]
        if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
            inner = walk(node.operand)
            sign = -1.0 if isinstance(node.op, ast.USub) else 1.0
            return lambda th: sign * inner(th)
        if isinstance(node, ast.BinOp) and type(node.op) in _BINARY:
            op, left, right = _BINARY[type(node.op)], walk(node.left), walk(node.right)
            return lambda th: op(left(th), right(th))
        if (isinstance(node, ast.Call) and isinstance(node.func, ast.Name)
                and node.func.id in _CALLS and len(node.args) == 1 and not node.keywords):
            fn, arg = _CALLS[node.func.id], walk(node.args[0])
            return lambda th: fn(arg(th))
        raise InputError(
            f"function {name!r}: {ast.unparse(node)!r} is not allowed; write the function with "
            f"parameter names, numbers, + - * / ** and exp, log, sqrt, or pass a Python callable "
            f"of the parameter Series."
        )

    body = walk(tree)
    return lambda th: body(th)


def _callables(functions: Mapping[str, Function], parameters: list[str]) -> dict[str, Callable[[pd.Series], float]]:
    if not isinstance(functions, Mapping) or not functions:
        raise InputError(
            "functions must be a non-empty mapping {name: expression or callable}, e.g. "
            "{'wear_in_swaps': 'wear_cost / swap_cost'}; got "
            f"{type(functions).__name__}."
        )
    out = {}
    for name, f in functions.items():
        if not isinstance(name, str) or not name:
            raise InputError(f"function names must be non-empty strings, got {name!r}.")
        if isinstance(f, str):
            out[name] = _compile(name, f, parameters)
        elif callable(f):
            out[name] = f
        else:
            raise InputError(
                f"function {name!r} must be an expression string or a callable, got "
                f"{type(f).__name__}."
            )
    return out


def check_functions(functions: Mapping[str, Function], parameters: list[str]) -> None:
    """Raise :class:`~orthoccp.InputError` for a bad name, expression or parameter name."""
    _callables(functions, parameters)


def _evaluate(name: str, f: Callable[[pd.Series], float], theta: np.ndarray, index: pd.Index) -> float:
    try:
        value = f(pd.Series(theta, index=index))
        value = float(value)
    except (ArithmeticError, ValueError, TypeError, KeyError) as exc:
        raise InputError(
            f"function {name!r} cannot be evaluated at the estimate or next to it "
            f"({type(exc).__name__}: {exc})."
        ) from exc
    return value


def delta_method(
    params: pd.Series,
    cov: pd.DataFrame,
    functions: Mapping[str, Function],
    *,
    level: float = 0.95,
) -> tuple[pd.DataFrame, pd.DataFrame]:
    r"""Estimates, delta-method standard errors and intervals of functions of the parameters.

    Parameters
    ----------
    params : pandas.Series
        The estimate :math:`\hat\theta`, indexed by parameter name.
    cov : pandas.DataFrame
        Its covariance :math:`\hat V`.
    functions : mapping
        Name -> an expression over parameter names (``"wear_cost / swap_cost"``; ``+ - * /
        **``, numbers, ``exp``, ``log``, ``sqrt``) or a callable taking the parameter Series
        and returning a number.
    level : float, default=0.95
        Confidence level.

    Returns
    -------
    table : pandas.DataFrame
        One row per function: ``estimate``, ``std_error``, ``z``, ``p_value``, ``ci_lower``,
        ``ci_upper`` (the columns of :meth:`orthoccp.Results.to_frame`).
    covariance : pandas.DataFrame
        :math:`\nabla G\,\hat V\,\nabla G'`, the joint covariance of the functions.

    Notes
    -----
    :math:`\mathrm{se}(g) = \sqrt{\nabla g'\hat V\nabla g}`, the gradient by central
    differences with step :math:`10^{-6}(1 + |\theta_k|)`. A function of a linear form is
    exact; otherwise the interval is first-order (module docstring).
    """
    if (isinstance(level, (bool, np.bool_)) or not isinstance(level, (int, float))
            or not 0 < level < 1):
        raise InputError(f"level must be a number in (0, 1) such as 0.95, got {level!r}.")
    index = params.index
    fns = _callables(functions, [str(k) for k in index])
    theta = params.to_numpy(dtype=np.float64)
    V = cov.loc[index, index].to_numpy(dtype=np.float64)
    values, grads = [], []
    for name, f in fns.items():
        value = _evaluate(name, f, theta, index)
        grad = central_jacobian(
            lambda t, f=f, name=name: np.array([_evaluate(name, f, t, index)]), theta)[0]
        if not (math.isfinite(value) and np.all(np.isfinite(grad))):
            raise InputError(
                f"function {name!r} is not finite at the estimate or next to it (value "
                f"{value}, gradient {np.round(grad, 6).tolist()}); the delta method needs a "
                f"function that is smooth there."
            )
        values.append(value)
        grads.append(grad)
    D = np.vstack(grads)
    C = D @ V @ D.T
    se = np.sqrt(np.clip(np.diag(C), 0.0, None))
    est = np.asarray(values)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = est / se
    crit = stats.norm.ppf(0.5 + level / 2)
    names = list(fns)
    table = pd.DataFrame({
        "estimate": est, "std_error": se, "z": z, "p_value": 2 * stats.norm.sf(np.abs(z)),
        "ci_lower": est - crit * se, "ci_upper": est + crit * se,
    }, index=pd.Index(names, name="function"))
    _warn_if_ratio_unreliable(fns, functions, params, np.sqrt(np.diag(V)))
    return table, pd.DataFrame(C, index=names, columns=names)


def _warn_if_ratio_unreliable(fns: Mapping[str, Any], functions: Mapping[str, Function],
                              params: pd.Series, se: np.ndarray) -> None:
    """Warn when an expression divides by a parameter that is within 3 s.e. of zero."""
    zs = {str(k): abs(v) / s if s > 0 else math.inf for k, v, s in zip(params.index, params, se)}
    for name in fns:
        text = functions[name]
        if not isinstance(text, str):
            continue
        for node in ast.walk(ast.parse(text.strip(), mode="eval")):
            if isinstance(node, ast.BinOp) and isinstance(node.op, ast.Div):
                weak = [n.id for n in ast.walk(node.right) if isinstance(n, ast.Name)
                        and zs.get(n.id, math.inf) < 3]
                if weak:
                    warnings.warn(
                        f"function {name!r} divides by {', '.join(weak)}, which is within 3 "
                        f"standard errors of zero (|z| = "
                        f"{', '.join(f'{zs[w]:.1f}' for w in weak)}); the delta-method interval "
                        f"of a ratio is unreliable there (common practice).",
                        OrthoCCPWarning, stacklevel=3,
                    )


def function_lines(table: pd.DataFrame, level: float) -> list[str]:
    """The summary block of functions of the parameters (the estimates table's layout)."""
    from .results import estimates_block

    return estimates_block(["functions of the parameters (delta method, same covariance):"],
                           table, level, label="function")
