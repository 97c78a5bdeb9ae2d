"""Error types, one per pipeline stage.

Every message names the file, line, component or limit at fault, so that a
user can act on it without reading a traceback.
"""
from __future__ import annotations


class RobustboxError(Exception):
    """Base class of all errors raised on purpose by robustbox."""


class CaseFileError(RobustboxError):
    """A case file cannot be read: the message names the file and line."""

    def __init__(self, path: str, line: int | None, message: str) -> None:
        where = f"{path}:{line}" if line is not None else str(path)
        super().__init__(f"{where}: {message}")
        self.path = str(path)
        self.line = line


class NetworkError(RobustboxError):
    """Network data that is inconsistent (unknown bus, no slack, bad limit)."""


class QuadraticSystemError(RobustboxError):
    """A quadratic system with mismatched dimensions or non-finite data."""


class OperatingPointError(RobustboxError):
    """The operating point does not solve the equations or violates limits."""

    def __init__(self, message: str, violations: list[str] | None = None) -> None:
        super().__init__(message)
        self.violations = list(violations or [])


class CertificateError(RobustboxError):
    """No certificate could be produced (singular Jacobian, empty box...)."""


class ModelStructureError(RobustboxError):
    """A Pyomo model whose structure the extraction cannot use."""


class SolverError(RobustboxError):
    """Ipopt (or another solver) did not return a usable solution."""


class RobustboxNote(UserWarning):
    """Something robustbox changed or ignored while reading its input (one line, names file and line).

    Issued with :func:`warnings.warn`; the command line prints it as ``robustbox: note: ...``.
    """
