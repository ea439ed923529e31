"""The exception tree shared by the whole project.

``service/`` maps these to HTTP statuses in one place (``service/errors.py``).

::

    TrimtabError
     +-- InvalidSettings      a setting has a value outside its valid set (config key named)
     +-- InvalidInput         an event or request is malformed (where + reason)
     |    +-- NonFiniteInput  a feature or target is NaN or infinite
     +-- SnapshotError        serialized state is truncated, corrupt or of another version
"""

from __future__ import annotations

__all__ = ["InvalidInput", "InvalidSettings", "NonFiniteInput", "SnapshotError", "TrimtabError", "code_of"]


class TrimtabError(Exception):
    """Base of every error trimtab raises on purpose."""

    def __init__(self, message: str, *, where: str = "") -> None:
        super().__init__(message)
        self.message = message
        self.where = where

    def __str__(self) -> str:
        return f"{self.where}: {self.message}" if self.where else self.message


class InvalidSettings(TrimtabError):
    """A setting is missing, of the wrong type or outside its valid values."""


class InvalidInput(TrimtabError):
    """An event or request body does not follow the event format."""


class NonFiniteInput(InvalidInput):
    """A feature value or target is NaN or infinite; it never reaches the model state."""


class SnapshotError(TrimtabError):
    """Serialized model state cannot be read back (truncated, corrupt, other version)."""


def code_of(table: dict, name: str, what: str, where: str) -> int:
    """``table[name]``, or :class:`InvalidSettings` naming the setting and its valid values."""
    try:
        return table[name]
    except (KeyError, TypeError):
        valid = ", ".join(sorted(table))
        raise InvalidSettings(f"Invalid {what} {name!r}. Valid values are: {valid}", where=where) from None
