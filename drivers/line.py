"""A session for plain line protocols: one line out, one line back, an optional identity query,
and reconnects that prove the instrument is back before anything else is sent.

SCPI instruments use `drivers.scpi.ScpiSession`, which extends this with `*IDN?`, `*OPC?`, the
error queue and joined settings; a board with a terse protocol of its own (the serial ADC) uses
this directly.
"""

from __future__ import annotations

import time
from collections.abc import Callable

from nightbench.drivers.errors import ConnectionLost, InstrumentError
from nightbench.drivers.transport import Transport

BACKOFF_S = (0.1, 0.3, 0.7, 1.5)  # waits before each reconnect attempt

Proof = Callable[[], object]  # a query that raises InstrumentError unless the instrument is in step


class LineSession:
    """Line discipline on top of a transport; knows nothing about what the instrument is.

    `opener` makes a NEW transport for a reconnect (reopening the same pyvisa object silently
    resets its timeout and terminations: FIELD-NOTES trap 5). `idn_query` may be None: some
    boards cannot say what they are, and are proven alive by a reading instead (see `reconnect`).
    """

    def __init__(
        self,
        transport: Transport,
        name: str,
        *,
        opener: Callable[[], Transport] | None = None,
        idn_query: str | None = None,
    ) -> None:
        self.transport = transport
        self.name = name
        self.opener = opener
        self.idn_query = idn_query
        self.idn = ""

    @property
    def resource(self) -> str:
        return self.transport.resource

    def identify(self) -> str:
        """Ask for the identity (opening a link proves nothing; the first reply does)."""
        if self.idn_query is None:
            raise InstrumentError(f"the {self.name} has no identity query", resource=self.resource)
        reply = self.transport.query(self.idn_query)
        if not reply:
            raise InstrumentError(f"empty reply to {self.idn_query}", resource=self.resource, command=self.idn_query)
        self.idn = reply
        return reply

    def query(self, command: str) -> str:
        return self.transport.query(command)

    def send(self, command: str) -> None:
        """The first half of a query: the reply is taken later with `receive`."""
        self.transport.write(command)

    def receive(self) -> str:
        return self.transport.read()

    def flush(self) -> None:
        """Throw away anything already received (a late reply after a timeout)."""
        self.transport.flush_input()

    def close(self) -> None:
        self.transport.close()

    def reconnect(self, should_stop: Callable[[], bool] = lambda: False, *, proof: Proof | None = None) -> None:
        """Drop the link and open a new one, with backoff, until the instrument is proven back:
        by the identity it had, or, with no identity query, by `proof` (which raises
        InstrumentError unless the instrument answers sensibly). ConnectionLost if it never is.

        A reply that arrives late, after its query timed out, lands on the next query (FIELD-NOTES
        trap 4; on a serial line even across a reopen), so the identity is compared, not just read.
        A reading cannot be compared with anything, so `proof` only shows the board answers.
        """
        if self.opener is None:
            raise ConnectionLost("lost and cannot be reopened", resource=self.resource)
        if self.idn_query is None and proof is None:
            raise ConnectionLost(
                f"the {self.name} has neither an identity query nor a proof to reconnect with", resource=self.resource
            )
        known = self.idn
        self.transport.close()
        last: InstrumentError | None = None
        for wait in BACKOFF_S:
            if should_stop():
                break
            time.sleep(wait)
            try:
                self.transport = self.opener()
                self.transport.flush_input()
                self._prove(known, proof)
                return
            except InstrumentError as exc:  # ConnectionLost included
                last = exc
                self.idn = known
                self.transport.close()
        raise ConnectionLost(
            f"the {self.name} did not come back after {len(BACKOFF_S)} reconnect attempts ({last})",
            resource=self.resource,
        ) from last

    def _prove(self, known: str, proof: Proof | None) -> None:
        if self.idn_query is None:
            assert proof is not None
            proof()
            return
        reply = self.identify()
        if known and reply != known:
            raise InstrumentError(
                f"answered {self.idn!r} instead of its identity (a stale reply?)", resource=self.resource
            )


class SessionRole:
    """The role methods (drivers/roles.py) that a role answers straight from its session."""

    session: LineSession

    @property
    def resource(self) -> str:
        return self.session.resource

    @property
    def identity(self) -> str:
        return self.session.idn

    def flush(self) -> None:
        self.session.flush()

    def close(self) -> None:
        self.session.close()
