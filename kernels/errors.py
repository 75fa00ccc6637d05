"""Errors and warnings raised by the library."""

__all__ = ["MeshError", "MeshWarning", "ConvergenceError", "InputError"]


class InputError(ValueError):
    """An argument has the wrong shape, type or value; the message says which and where."""


class MeshError(InputError):
    """A mesh is invalid; the message names the triangle or point and the problem."""


class MeshWarning(UserWarning):
    """A mesh was accepted but changed or has something worth knowing (reoriented, unused points)."""


class ConvergenceError(RuntimeError):
    """An iterative solver stopped before reaching the requested tolerance."""
