"""The exception tree of toposcout.

::

    ToposcoutError            every error the library raises on purpose
     ├── ModelError           malformed model input (a field or a line is named)
     ├── TargetError          unknown connectivity or gate set, or a model that does not fit
     ├── ProfileError         malformed device profile (T2 > 2·T1, negative error, ...)
     ├── CapacityError        over a configured cap (variables, terms, clique size, memory)
     └── CompileError         compilation failed or broke an invariant (coupling map)

Each carries ``field``: the JSON field or file line the message is about (``None`` when
the error is not about one place). The service maps each branch to one HTTP status.
"""

from __future__ import annotations

__all__ = [
    "ToposcoutError",
    "ModelError",
    "TargetError",
    "ProfileError",
    "CapacityError",
    "CompileError",
]


class ToposcoutError(Exception):
    """Base class: ``str(err)`` is the whole message, ``err.field`` names where."""

    def __init__(self, message: str, *, field: str | None = None):
        super().__init__(message)
        self.field = field

    @property
    def message(self) -> str:
        return str(self)


class ModelError(ToposcoutError):
    """The model file or object is malformed."""


class TargetError(ToposcoutError):
    """Unknown connectivity or gate set, or the model cannot be placed on it."""


class ProfileError(ToposcoutError):
    """A device profile is malformed or physically impossible."""


class CapacityError(ToposcoutError):
    """A request exceeds a configured cap (variables, terms, clique size, memory)."""


class CompileError(ToposcoutError):
    """Compilation failed or produced a circuit that breaks an invariant."""
