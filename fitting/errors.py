"""Error types shared by the science core, the batch runner, the CLI and the GUI.

Every error a user can cause is a subclass of :class:`PellucidError`, so the GUI
can show it in a dialog and the CLI can turn it into an exit status, while
programming mistakes (TypeError, AttributeError ...) still surface as bugs.
Messages say what is wrong, quote the offending value and say what to do.
"""

from __future__ import annotations


class PellucidError(Exception):
    """Base class of every error Pellucid raises on purpose."""


class ParameterError(PellucidError, ValueError):
    """A model or stack parameter has an impossible value (NaN, negative thickness ...)."""

    def __init__(self, name: str, value, reason: str):
        self.name, self.value, self.reason = name, value, reason
        super().__init__(f"parameter {name!r} = {value!r}: {reason}")


class WavelengthRangeError(PellucidError, ValueError):
    """A wavelength lies outside the range where a model or table is valid."""

    def __init__(self, model: str, lo_nm: float, hi_nm: float, bad_lo: float, bad_hi: float):
        self.model, self.lo_nm, self.hi_nm = model, lo_nm, hi_nm
        super().__init__(
            f"{model} is valid from {lo_nm:g} to {hi_nm:g} nm, but wavelengths "
            f"{bad_lo:g}-{bad_hi:g} nm were requested; restrict the fit range or "
            f"choose a material whose data cover it"
        )


class SpectrumFormatError(PellucidError, ValueError):
    """A spectrum file cannot be read. Carries the file, the line and what was wrong."""

    def __init__(self, path, line: int | None, reason: str, *, expected: str = "",
                 found: str = ""):
        self.path, self.line, self.reason = path, line, reason
        self.expected, self.found = expected, found
        where = f"{path}" if line is None else f"{path}, line {line}"
        msg = f"{where}: {reason}"
        if expected:
            msg += f"; expected {expected}"
        if found:
            msg += f", found {found!r}"
        super().__init__(msg)


class RecipeError(PellucidError, ValueError):
    """A recipe or project file is invalid. Names the field and the problem."""

    def __init__(self, field: str, problem: str, *, path=None):
        self.field, self.problem, self.path = field, problem, path
        where = f"{path}: " if path else ""
        super().__init__(f"{where}field {field!r}: {problem}")


class FitError(PellucidError, RuntimeError):
    """A fit could not even start (inconsistent setup, no usable data points)."""
