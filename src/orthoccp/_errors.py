"""Exceptions and warnings raised by orthoccp."""

from __future__ import annotations

__all__ = ["InputError", "EstimationError", "OrthoCCPWarning"]


class InputError(ValueError):
    """Bad data, model description or option.

    The message names the column, key or option, the bad value and how to fix it.
    Subclasses :class:`ValueError` so generic handlers keep working.
    """


class EstimationError(RuntimeError):
    """The second-stage solve failed (singular Jacobian, no convergence, ...).

    The message reports the condition number and the last Newton step, never a silent NaN.
    """


class OrthoCCPWarning(UserWarning):
    """A numerical situation the user should know about (clipped probabilities, ...)."""
