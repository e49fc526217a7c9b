"""The project's one exception hierarchy.

Every failure a user can see is a `NightbenchError` with structured fields, so the CLI can print
one plain sentence and choose an exit code without guessing from a message string. Transport
exceptions (pyvisa, pyserial, socket) are mapped to these at the driver boundary with
`raise ... from exc`, so nothing above the drivers ever catches a library's own exception.
"""

from __future__ import annotations


class NightbenchError(Exception):
    """Root of every error nightbench raises on purpose."""

    exit_code = 1

    def __init__(
        self,
        message: str,
        *,
        resource: str | None = None,
        command: str | None = None,
        scpi_code: int | None = None,
        file: str | None = None,
        line: int | None = None,
        key: str | None = None,
    ) -> None:
        super().__init__(message)
        self.message = message
        self.resource = resource
        self.command = command
        self.scpi_code = scpi_code
        self.file = file
        self.line = line
        self.key = key

    def __str__(self) -> str:
        parts = []
        if self.file:
            where = self.file if self.line is None else f"{self.file}, line {self.line}"
            parts.append(where)
        if self.key:
            parts.append(f"key '{self.key}'")
        head = ": ".join([", ".join(parts)] if parts else [])
        text = f"{head}: {self.message}" if head else self.message
        if self.resource:
            text += f" (instrument {self.resource}"
            if self.command:
                text += f", while sending {self.command!r}"
            text += ")"
        if self.scpi_code is not None:
            text += f" [SCPI error {self.scpi_code}]"
        return text


class InputError(NightbenchError):
    """Bad input from the user: a plan, a file, an argument. Changes nothing; exit code 2."""

    exit_code = 2


class InstrumentError(NightbenchError):
    """An instrument could not be reached or did something we did not ask for."""


class ConnectionLost(InstrumentError):
    """The link to an instrument broke (refused, reset, closed, timed out); a reconnect may help."""


class ScpiError(InstrumentError):
    """The instrument put an entry in its error queue: the setting may not have happened."""


class SafetyError(NightbenchError):
    """A command would have broken a safety invariant (DUT level ceiling); it was not sent."""
