"""The project's one exception hierarchy.

    NightbenchError                 message; exit code 1           (root: anything raised on purpose)
    ├── InputError                  + file, line, key; exit code 2 (a plan, a file, an argument)
    ├── InstrumentError             + resource, command, scpi_code (an instrument misbehaved)
    │   ├── ConnectionLost          the link broke; a reconnect may help
    │   └── ScpiError               the instrument's error queue had an entry (scpi_code set)
    └── SafetyError                 + resource; a command that would break a safety invariant

Every failure a user can see is one of these, with structured fields, so the CLI can print one
plain sentence and choose an exit code without guessing from a message string. Library
exceptions (pyvisa, pyserial, socket) are mapped to these at the driver boundary with
`raise ... from exc`, so nothing above the drivers catches a library's own exception.

Context is added on the way up, to the same object, its type, fields and cause kept:

    except NightbenchError as exc:
        exc.add_context("the meter cannot be opened", resource=spec.resource)
        raise

Rebuilding an exception instead (`type(exc)(...)`) drops the fields the call does not pass (an
SCPI code) and breaks for subclasses with other signatures.
"""

from __future__ import annotations

from typing import Any, Self


class NightbenchError(Exception):
    """Root of every error nightbench raises on purpose."""

    exit_code = 1
    FIELDS: tuple[str, ...] = ()  # the structured fields a subclass carries

    def __init__(self, message: str) -> None:
        super().__init__(message)
        self.message = message

    def add_context(self, context: str, **fields: Any) -> Self:
        """Prefix the message with `context` (what was being done) and fill those of `fields` that
        this class carries and that are still unset. Returns self (`raise exc.add_context(...)` works
        outside an `except` block; inside one, call it and use a bare `raise`).
        Fields the class does not carry are skipped: adding context must never raise."""
        if context:
            self.message = f"{context}: {self.message}"
            self.args = (self.message,)
        for name, value in fields.items():
            if name in self.FIELDS and getattr(self, name) is None:
                setattr(self, name, value)
        return self

    def __str__(self) -> str:
        return self.message


class InputError(NightbenchError):
    """Bad input from the user: a plan, a file, an argument. Changes nothing; exit code 2."""

    exit_code = 2
    FIELDS = ("file", "line", "key")

    def __init__(
        self, message: str, *, file: str | None = None, line: int | None = None, key: str | None = None
    ) -> None:
        super().__init__(message)
        self.file = file
        self.line = line
        self.key = key

    def __str__(self) -> str:
        where = [] if not self.file else [self.file if self.line is None else f"{self.file}, line {self.line}"]
        if self.key:
            where.append(f"key '{self.key}'")
        return f"{', '.join(where)}: {self.message}" if where else self.message


class InstrumentError(NightbenchError):
    """An instrument could not be reached or did something we did not ask for."""

    FIELDS = ("resource", "command", "scpi_code")

    def __init__(
        self, message: str, *, resource: str | None = None, command: str | None = None, scpi_code: int | None = None
    ) -> None:
        super().__init__(message)
        self.resource = resource
        self.command = command
        self.scpi_code = scpi_code

    def __str__(self) -> str:
        text = self.message
        if self.resource:
            sending = f", while sending {self.command!r}" if self.command else ""
            text += f" (instrument {self.resource}{sending})"
        if self.scpi_code is not None:
            text += f" [SCPI error {self.scpi_code}]"
        return text


class ConnectionLost(InstrumentError):
    """The link to an instrument broke (refused, reset, closed, timed out); a reconnect may help."""


class ScpiError(InstrumentError):
    """The instrument put an entry in its error queue: the setting may not have happened."""


class SafetyError(NightbenchError):
    """A command would have broken a safety invariant (DUT level ceiling); it was not sent."""

    FIELDS = ("resource",)

    def __init__(self, message: str, *, resource: str | None = None) -> None:
        super().__init__(message)
        self.resource = resource

    def __str__(self) -> str:
        return f"{self.message} (instrument {self.resource})" if self.resource else self.message
