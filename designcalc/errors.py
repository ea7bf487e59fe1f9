"""The user-facing error hierarchy.

Every error a user can cause carries where it happened (file and dotted key),
what is allowed, what was received, and a suggested fix when there is one, so
the command layer can print one clear paragraph and exit with code 2.
"""

from __future__ import annotations

__all__ = ["DesignCalcError", "ScenarioError", "ExpressionError", "ModelError"]


class DesignCalcError(ValueError):
    """Base class of all errors caused by user input (never a bug)."""


class ScenarioError(DesignCalcError):
    """A scenario file is unreadable or states something impossible.

    Parameters
    ----------
    message
        What is wrong, in plain words.
    file
        The scenario file's name (or ``"<scenario>"`` for in-memory input).
    key
        The dotted key, e.g. ``design.treatment_probability``.
    allowed
        What the key accepts.
    received
        What was found.
    hint
        A suggested fix, when there is one.
    """

    def __init__(
        self,
        message: str,
        *,
        file: str = "<scenario>",
        key: str = "",
        allowed: str = "",
        received: object = None,
        hint: str = "",
    ) -> None:
        self.file = file
        self.key = key
        self.allowed = allowed
        self.received = received
        self.hint = hint
        self.reason = message
        super().__init__(self._render())

    def _render(self) -> str:
        where = f"{self.file}: {self.key}" if self.key else self.file
        lines = [f"{where}: {self.reason}"]
        if self.allowed:
            lines.append(f"  allowed: {self.allowed}")
        if self.received is not None:
            lines.append(f"  received: {self.received!r}")
        if self.hint:
            lines.append(f"  hint: {self.hint}")
        return "\n".join(lines)


class ExpressionError(DesignCalcError):
    """An arithmetic expression in a scenario uses something not on the whitelist."""


class ModelError(DesignCalcError):
    """A model specification is inconsistent (e.g. an asymmetric affinity matrix)."""
