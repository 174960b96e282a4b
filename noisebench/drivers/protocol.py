"""Protocol tests for drivers and profiles: a scripted, in-memory transport.

``replay_dialogue(script, build)`` builds an instrument with ``build(transport)`` on a
:class:`FakeTransport` that holds the exact dialogue the driver must have, in order::

    from noisebench.drivers import ScpiGenerator, load_profile
    from noisebench.drivers.protocol import replay_dialogue

    script = [
        ("*IDN?", "Fictional Labs,SG-1,42,1.0"),       # a query and its reply
        ("*CLS", None),                       # a command without reply
        ("SYST:ERR?", '0,"No error"'),
        ...
    ]
    with replay_dialogue(script, lambda t: ScpiGenerator(t, load_profile("mine.toml"))) as gen:
        gen.set_output(False)

The test FAILS (``ProtocolError``, an ``AssertionError``) when the driver sends a command that
is not the next one in the script, when it writes a command whose scripted reply it never
reads, when it reads a reply that was not scripted, and - at the end of the ``with`` block -
when exchanges are left over. A reply may also be ``bytes`` (a raw binary block for
``query_binary``) or an exception instance (raised at that exchange, to test error paths).
``(RECOVER, "reconnect")`` or ``(RECOVER, "clear")`` scripts the driver's call of
``Transport.recover()`` and what it did.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from typing import Any, TypeVar

import numpy as np

from .transport import (
    Transport,
    _header_length,
    decode_block_values,
    parse_ascii_values,
    seconds_to_ms,
    split_definite_block,
)

__all__ = ["RECOVER", "FakeTransport", "ProtocolError", "ieee_block", "replay_dialogue"]

RECOVER = "<recover>"
Reply = str | bytes | BaseException | None
T = TypeVar("T")


class ProtocolError(AssertionError):
    """The driver's dialogue differs from the scripted one."""


def ieee_block(
    values: Sequence[float] | np.ndarray, datatype: str = "f", big_endian: bool = True
) -> bytes:
    """An IEEE 488.2 definite-length block of ``values`` (float32/float64), with terminator."""
    dtype = np.dtype((">" if big_endian else "<") + {"f": "f4", "d": "f8"}[datatype])
    payload = np.asarray(values, dtype=dtype).tobytes()
    digits = str(len(payload))
    return b"#" + str(len(digits)).encode() + digits.encode() + payload + b"\n"


class FakeTransport(Transport):
    """A :class:`~noisebench.drivers.transport.Transport` that plays a fixed script."""

    def __init__(
        self,
        exchanges: Sequence[tuple[str, Reply]],
        *,
        timeout_s: float = 5.0,
        resource: str = "fake::protocol",
    ) -> None:
        self.script: list[tuple[str, Reply]] = [
            self._check_item(i, e) for i, e in enumerate(exchanges)
        ]
        self.position = 0
        self.resource = resource
        self.log: list[tuple[str, Reply]] = []
        self.timeouts_s: list[float] = []  # every timeout the driver set, in order
        self._timeout_s = float(timeout_s)
        self._open = True

    @staticmethod
    def _check_item(index: int, item: Any) -> tuple[str, Reply]:
        if not (isinstance(item, tuple) and len(item) == 2 and isinstance(item[0], str)):
            raise ProtocolError(
                f"script item {index} must be (command, reply or None), got {item!r}"
            )
        return item

    # -- Transport ---------------------------------------------------------------------

    @property
    def timeout_s(self) -> float:
        return self._timeout_s

    def _set_timeout_s(self, seconds: float) -> None:
        seconds_to_ms(seconds)
        self._timeout_s = float(seconds)
        self.timeouts_s.append(float(seconds))

    @property
    def is_open(self) -> bool:
        return self._open

    def write(self, command: str) -> None:
        reply = self._next(command, "write")
        if reply is not None:
            raise ProtocolError(
                self._where(command) + f"the driver wrote {command!r} but the "
                f"script expects it to read the reply {reply!r}"
            )

    def query(self, command: str) -> str:
        reply = self._next(command, "query")
        if not isinstance(reply, str):
            raise ProtocolError(
                self._where(command) + f"the driver queried {command!r} but "
                f"the script has no text reply for it ({reply!r})"
            )
        return reply.strip()

    def query_binary(
        self,
        command: str,
        *,
        datatype: str = "f",
        big_endian: bool = True,
        timeout_s: float | None = None,
    ) -> np.ndarray:
        if timeout_s is not None:
            seconds_to_ms(timeout_s)
            self.timeouts_s.append(float(timeout_s))  # the block's own limit
        reply = self._next(command, "binary query")
        if isinstance(reply, bytes):
            return decode_block_values(
                split_definite_block(reply, command), datatype, big_endian, command
            )
        if isinstance(reply, str):  # ASCII trace given to a binary read: a driver bug
            parse_ascii_values(reply, command)
        raise ProtocolError(
            self._where(command) + f"the driver read {command!r} as a binary "
            f"block but the script's reply is {type(reply).__name__}"
        )

    @property
    def reads_block_then_text(self) -> bool:
        return True

    def query_block_then_text(
        self,
        command: str,
        *,
        datatype: str = "f",
        big_endian: bool = True,
        timeout_s: float | None = None,
    ) -> tuple[np.ndarray | None, str]:
        """The scripted reply is ``bytes``: a block, ``;`` and the text unit (``ieee_block(v)
        + b'...'`` with the block's terminator replaced), or text alone (no block)."""
        if timeout_s is not None:
            seconds_to_ms(timeout_s)
            self.timeouts_s.append(float(timeout_s))
        reply = self._next(command, "binary-then-text query")
        if isinstance(reply, str):
            return None, reply.strip()
        if not isinstance(reply, bytes):
            raise ProtocolError(
                self._where(command) + f"the driver read {command!r} as a block then text "
                f"but the script's reply is {type(reply).__name__}"
            )
        start, length = _header_length(reply, command)
        rest = reply[start + length :]
        if not rest.startswith(b";"):
            raise ProtocolError(self._where(command) + "scripted reply has no ';' after the block")
        payload = reply[start : start + length]
        values = decode_block_values(payload, datatype, big_endian, command)
        return values, rest[1:].decode("ascii").strip()

    def recover(self) -> bool:
        reply = self._next(RECOVER, "recover")
        if reply not in ("reconnect", "clear"):
            raise ProtocolError(
                f"script item {self.position - 1}: reply to {RECOVER} must be "
                f"'reconnect' or 'clear' (got {reply!r})"
            )
        return reply == "reconnect"

    def close(self) -> None:
        self._open = False

    # -- script ------------------------------------------------------------------------

    def _where(self, command: str) -> str:
        return f"exchange {self.position} ({command!r}): "

    def _next(self, command: str, action: str) -> Reply:
        if self.position >= len(self.script):
            raise ProtocolError(
                f"unexpected {action} {command!r} after the end of the script "
                f"({len(self.script)} exchanges)"
            )
        expected, reply = self.script[self.position]
        if command != expected:
            raise ProtocolError(
                f"exchange {self.position}: expected {expected!r}, the driver "
                f"sent {command!r} ({action}); done so far: "
                f"{[c for c, _ in self.log][-5:]}"
            )
        self.position += 1
        self.log.append((command, reply))
        if isinstance(reply, BaseException):
            raise reply
        return reply

    @property
    def remaining(self) -> list[tuple[str, Reply]]:
        """Exchanges not yet played."""
        return self.script[self.position :]

    def assert_done(self) -> None:
        """Fail if scripted exchanges were never played."""
        if self.remaining:
            missing = ", ".join(repr(c) for c, _ in self.remaining[:5])
            raise ProtocolError(
                f"{len(self.remaining)} scripted exchange(s) never happened, "
                f"starting at {self.position}: {missing}"
            )


@contextmanager
def replay_dialogue(
    script: Sequence[tuple[str, Reply]], build: Callable[..., T], **kwargs: Any
) -> Iterator[T]:
    """Build ``build(transport, **kwargs)`` on a transport that plays ``script``; check the
    dialogue.

    Fails on an unexpected command, an unread or unscripted reply, or (when the block ends
    without an exception) a scripted exchange that never happened.
    """
    transport = FakeTransport(script)
    instrument = build(transport, **kwargs)
    yield instrument
    transport.assert_done()
