"""VISA sessions: pyvisa underneath, benchrun errors on top.

:class:`InstrumentSession` is the only place that talks to pyvisa. It

* opens ``TCPIP0::<host>::<port>::SOCKET`` (or any VISA resource) through the VISA library
  named by a pyvisa spec string (``"@py"`` = pyvisa-py by default, ``""`` = the system
  library, or a path),
* writes and queries text with ``"\\n"`` termination,
* reads definite-length binary blocks with the read terminator *disabled*: ``#``, the digit
  count, the length, then exactly ``length`` (+1 when the family sends a terminator) bytes.
  The payload is never scanned for a terminator (DESIGN.md §7: pyvisa-py's terminator scan
  falls to 0.22 MB/s on a flat trace at code 10 = ``"\\n"``),
* translates pyvisa and socket errors into :mod:`benchrun.errors` with ``raise ... from exc``:
  :class:`~benchrun.errors.InstrumentTimeout`, :class:`~benchrun.errors.ConnectionLost`,
  :class:`~benchrun.errors.ProtocolError`,
* sees a dropped connection as soon as the peer's end-of-file arrives (pyvisa-py alone
  would wait out the whole I/O timeout),
* makes one reconnect attempt when the connection dropped, and repeats the interrupted
  operation once if the caller marked it repeatable (``retry=True``; a ``fire`` is not);
  repeatable writes sent since the last answered query are repeated too (a dropped
  connection may have swallowed them),
* reopens the connection before the next operation after a timeout or a malformed block, so
  a late answer can never be taken for the answer to the next query.

Anything with the same ``write``/``query``/``query_block``/``resource`` methods (for example
the recording fake session of the tests) can stand in for it in the role drivers.
"""

from __future__ import annotations

import contextlib
import os
import select
import socket
import threading
from collections.abc import Callable
from typing import Protocol, TypeVar

import pyvisa
import pyvisa.constants
import pyvisa.errors

from benchrun.errors import ConnectionLost, InstrumentError, InstrumentTimeout, ProtocolError
from benchrun.instruments import scpi

T = TypeVar("T")

DEFAULT_VISA_LIBRARY = "@py"

#: Block payloads are read in pieces of this size (cache-resident copies are ~3x faster than
#: copies of a whole 10 MB trace; measured by benchmarks/transfer.py).
BLOCK_CHUNK = 1 << 18

#: Writes remembered for repetition after a dropped connection (see ``_recover``).
MAX_UNCONFIRMED = 256

#: recv size set on pyvisa-py socket sessions (pyvisa-py's default is 4096 bytes per recv)
FAST_RECV_SIZE = BLOCK_CHUNK


class Transport(Protocol):
    """What a role driver needs from a session (InstrumentSession or a test double)."""

    resource: str

    def write(self, command: str, *, retry: bool = True) -> None: ...

    def query(self, command: str, *, retry: bool = True) -> str: ...

    def query_block(self, command: str, *, terminator: bool, retry: bool = True) -> bytes: ...


_MANAGERS: dict[str, pyvisa.ResourceManager] = {}


def resource_manager(visa_library: str = DEFAULT_VISA_LIBRARY) -> pyvisa.ResourceManager:
    """One shared pyvisa ResourceManager per VISA library spec string."""
    rm = _MANAGERS.get(visa_library)
    if rm is None:
        try:
            rm = pyvisa.ResourceManager(visa_library)
        except (OSError, ValueError, pyvisa.errors.Error) as exc:
            raise InstrumentError(f"cannot load VISA library {visa_library!r}: {exc}") from exc
        _MANAGERS[visa_library] = rm
    return rm


class InstrumentSession:
    """A message-based VISA session to one instrument.

    Parameters
    ----------
    resource
        VISA resource string, e.g. ``"TCPIP0::127.0.0.1::5025::SOCKET"``.
    visa_library
        pyvisa library spec (``"@py"`` for pyvisa-py, ``""`` for the system VISA).
    timeout_s
        I/O timeout for every read.
    open_timeout_s
        Time allowed to open the connection.
    """

    def __init__(
        self,
        resource: str,
        *,
        visa_library: str = DEFAULT_VISA_LIBRARY,
        timeout_s: float = 5.0,
        open_timeout_s: float = 5.0,
    ) -> None:
        self.resource = resource
        self.visa_library = visa_library
        self._timeout_s = float(timeout_s)
        self._open_timeout_s = float(open_timeout_s)
        self._inst: pyvisa.resources.MessageBasedResource | None = None
        self._stale = False
        self._unconfirmed: list[tuple[str, bool]] = []
        #: non-repeatable writes that were in flight when a connection dropped
        self.unconfirmed_lost: list[str] = []
        self.reconnects = 0
        # one operation (write, or write and read its answer) at a time: the runner's
        # watchdog refresh writes from its own thread
        self._lock = threading.RLock()
        self.open()

    # --- lifecycle --------------------------------------------------------------------------

    def open(self) -> None:
        """Open the VISA session; ConnectionLost when the instrument cannot be reached."""
        rm = resource_manager(self.visa_library)
        try:
            inst = rm.open_resource(
                self.resource,
                open_timeout=int(self._open_timeout_s * 1000),
                read_termination="\n",
                write_termination="\n",
                timeout=int(self._timeout_s * 1000),
            )
        except Exception as exc:  # pyvisa-py raises a bare Exception("could not connect")
            raise ConnectionLost(f"cannot open {self.resource}: {exc}") from exc
        if not isinstance(inst, pyvisa.resources.MessageBasedResource):
            inst.close()
            raise InstrumentError(f"{self.resource} is not a message-based resource")
        self._inst = inst
        self._stale = False
        self._tune_backend()
        sock = self._backend_socket()
        if sock is not None:
            # pyvisa-py reports a refused non-blocking connect as success; ask the socket
            code = sock.getsockopt(socket.SOL_SOCKET, socket.SO_ERROR)
            if code:
                self.close()
                raise ConnectionLost(f"cannot open {self.resource}: {os.strerror(code)}")

    def close(self) -> None:
        """Close the session (idempotent)."""
        inst, self._inst = self._inst, None
        if inst is not None:
            # closing a dead session: nothing left to release
            with contextlib.suppress(pyvisa.errors.Error, OSError):
                inst.close()

    def reconnect(self) -> None:
        """Close and reopen the session."""
        self.close()
        self.reconnects += 1
        self.open()

    def __enter__(self) -> InstrumentSession:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @property
    def timeout_s(self) -> float:
        return self._timeout_s

    @timeout_s.setter
    def timeout_s(self, value: float) -> None:
        self._timeout_s = float(value)
        if self._inst is not None:
            self._inst.timeout = int(self._timeout_s * 1000)

    # --- operations --------------------------------------------------------------------------

    def write(self, command: str, *, retry: bool = True) -> None:
        """Send one command (``"\\n"`` appended)."""
        self._run(command, lambda inst: inst.write(command), retry, is_write=True)

    def query(self, command: str, *, retry: bool = True) -> str:
        """Send a query and return the text answer without its terminator."""
        return self._run(command, lambda inst: self._query(inst, command), retry)

    def query_block(self, command: str, *, terminator: bool, retry: bool = True) -> bytearray:
        """Send a query answered by a definite-length block; return the payload bytes.

        Parameters
        ----------
        terminator
            True when the family sends ``"\\n"`` after the block (the command table's
            ``terminator_after_block``). Exactly that byte is read and checked.
        """
        return self._run(command, lambda inst: self._read_block(inst, command, terminator),
                         retry)

    # --- internals ---------------------------------------------------------------------------

    def _query(self, inst: pyvisa.resources.MessageBasedResource, command: str) -> str:
        inst.write(command)
        self._await_answer()
        return inst.read()

    def _await_answer(self) -> None:
        """Wait for the first byte of an answer; a connection the peer closed is a drop at once.

        pyvisa-py's read keeps polling a socket that reached end-of-file until the I/O
        timeout, so a dropped connection would only be seen after the whole timeout. Waiting
        here with ``select`` sees the end-of-file (or reset) as soon as it arrives. No
        answer within the timeout is a timeout, as from pyvisa. Other backends: no wait.
        """
        sock = self._backend_socket()
        if sock is None or self._backend_buffered():
            return
        try:
            readable, _, _ = select.select([sock], [], [], self._timeout_s)
        except ValueError:  # a descriptor select cannot watch: the wait is left to pyvisa
            return
        except OSError as exc:
            raise _Dropped() from exc
        if not readable:
            raise pyvisa.errors.VisaIOError(pyvisa.constants.StatusCode.error_timeout)
        try:
            closed = sock.recv(1, socket.MSG_PEEK) == b""
        except OSError as exc:  # reset by the peer
            raise _Dropped() from exc
        if closed:
            raise _Dropped()

    def _backend_buffered(self) -> bool:
        """True when the pyvisa-py session already holds received bytes not yet read."""
        inst = self._inst
        sessions = getattr(inst.visalib, "sessions", None) if inst is not None else None
        backend = sessions.get(inst.session) if isinstance(sessions, dict) else None
        return bool(getattr(backend, "_pending_buffer", b""))

    def _read_block(self, inst: pyvisa.resources.MessageBasedResource, command: str,
                    terminator: bool) -> bytearray:
        inst.write(command)
        self._await_answer()
        saved = inst.read_termination
        inst.read_termination = None
        try:
            n = scpi.block_digit_count(inst.read_bytes(2))
            length = scpi.block_data_length(inst.read_bytes(n))
            total = length + (1 if terminator else 0)
            buffer = bytearray(total)
            view = memoryview(buffer)
            got = 0
            try:
                # cache-sized exact reads into one preallocated buffer: no terminator scan,
                # no growing copies of the whole trace
                while got < total:
                    size = min(BLOCK_CHUNK, total - got)
                    chunk = inst.read_bytes(size, chunk_size=BLOCK_CHUNK)
                    view[got : got + len(chunk)] = chunk
                    got += len(chunk)
            except pyvisa.errors.VisaIOError as exc:
                if exc.error_code == pyvisa.constants.StatusCode.error_timeout and \
                        not self._peer_closed():
                    self._stale = True
                    raise ProtocolError(
                        f"{self.resource}: truncated block: {length} bytes announced, "
                        f"{got} received before the {self._timeout_s:g} s timeout") from exc
                raise
            finally:
                view.release()
        finally:
            if self._inst is inst:
                inst.read_termination = saved
        if terminator:
            if buffer[-1:] != b"\n":
                self._stale = True
                raise ProtocolError(f"{self.resource}: expected '\\n' after the block, "
                                    f"got {bytes(buffer[-1:])!r}")
            del buffer[-1]
        return buffer

    def _run(self, what: str, op: Callable[[pyvisa.resources.MessageBasedResource], T],
             retry: bool, *, is_write: bool = False) -> T:
        with self._lock:
            return self._run_unlocked(what, op, retry, is_write=is_write)

    def _run_unlocked(self, what: str, op: Callable[[pyvisa.resources.MessageBasedResource], T],
                      retry: bool, *, is_write: bool = False) -> T:
        if self._inst is None or self._stale:
            self._reopen(what)
            self._unconfirmed.clear()
        elif self._peer_closed():
            self._recover(what, None)
        try:
            result = self._attempt(what, op)
        except _Dropped as dropped:
            self._recover(what, dropped.__cause__)
            if not retry:
                raise ConnectionLost(
                    f"{self.resource}: connection dropped during {what!r}; reconnected, "
                    "the command was not repeated") from dropped.__cause__
            try:
                result = self._attempt(what, op)
            except _Dropped as again:
                self._stale = True
                raise ConnectionLost(
                    f"{self.resource}: connection dropped again during {what!r} after one "
                    "reconnect") from again.__cause__
        if is_write:
            self._unconfirmed.append((what, retry))
            del self._unconfirmed[:-MAX_UNCONFIRMED]
        else:
            # an answer on the same stream proves the earlier writes arrived
            self._unconfirmed.clear()
        return result

    def _recover(self, what: str, cause: BaseException | None) -> None:
        """Reconnect once after a drop and re-send writes the old connection may have lost.

        Writes are only known to have arrived once a later query on the same connection was
        answered. Unconfirmed repeatable writes (settings) are sent again on the new
        connection; non-repeatable ones (a ``fire``) are not, and are listed in
        :attr:`unconfirmed_lost` (a shot that did not happen shows up as a missing trigger;
        the operation that found the drop, for example switching an output off, must still
        go through).
        """
        pending, self._unconfirmed = self._unconfirmed, []
        self._reopen(what, cause)
        self.unconfirmed_lost.extend(cmd for cmd, repeatable in pending if not repeatable)
        for command in [p for p in pending if p[1]]:
            try:
                self._attempt(command[0], lambda inst, c=command[0]: inst.write(c))
            except _Dropped as again:
                self._stale = True
                raise ConnectionLost(
                    f"{self.resource}: connection dropped again while repeating "
                    f"{command[0]!r} after one reconnect") from again.__cause__
            self._unconfirmed.append(command)

    def _attempt(self, what: str, op: Callable[[pyvisa.resources.MessageBasedResource], T]
                 ) -> T:
        assert self._inst is not None
        try:
            return op(self._inst)
        except ProtocolError as exc:
            self._stale = True
            if self._peer_closed():
                raise _Dropped() from exc
            raise
        except pyvisa.errors.VisaIOError as exc:
            if exc.error_code == pyvisa.constants.StatusCode.error_timeout:
                closed = self._peer_closed()
                self._stale = True
                if closed:
                    raise _Dropped() from exc
                raise InstrumentTimeout(
                    f"{self.resource}: no answer to {what!r} within {self._timeout_s:g} s"
                ) from exc
            raise _Dropped() from exc
        except (OSError, pyvisa.errors.InvalidSession) as exc:
            raise _Dropped() from exc
        except UnicodeDecodeError as exc:
            self._stale = True
            raise ProtocolError(f"{self.resource}: answer to {what!r} is not text") from exc

    def _reopen(self, what: str, cause: BaseException | None = None) -> None:
        try:
            self.reconnect()
        except ConnectionLost as exc:
            raise ConnectionLost(
                f"{self.resource}: connection lost ({what!r}) and the reconnect failed: "
                f"{exc}") from (cause or exc)

    def _backend_socket(self) -> socket.socket | None:
        """The pyvisa-py socket behind the session, when that backend is in use."""
        inst = self._inst
        if inst is None:
            return None
        sessions = getattr(inst.visalib, "sessions", None)
        backend = sessions.get(inst.session) if isinstance(sessions, dict) else None
        sock = getattr(backend, "interface", None)
        return sock if isinstance(sock, socket.socket) else None

    def _peer_closed(self) -> bool:
        """True when the peer has closed the TCP connection (pyvisa-py sockets only)."""
        sock = self._backend_socket()
        if sock is None:
            return False
        try:
            readable, _, _ = select.select([sock], [], [], 0)
            if not readable:
                return False
            return sock.recv(1, socket.MSG_PEEK) == b""
        except (OSError, ValueError):
            return True

    def _tune_backend(self) -> None:
        """Small-message latency and large-block throughput settings.

        TCP_NODELAY: without it two short writes in a row (select source, then query) wait
        for the peer's delayed ACK (~40 ms on Linux, Nagle's algorithm, RFC 896/1122).
        pyvisa-py 0.8 does not apply ``VI_ATTR_TCPIP_NODELAY`` to its socket, so the option
        is also set on the socket directly; its recv size is raised to :data:`BLOCK_CHUNK`.
        """
        inst = self._inst
        if inst is None:
            return
        # backends that do not support the attribute raise their own exception types
        with contextlib.suppress(Exception):
            inst.set_visa_attribute(pyvisa.constants.ResourceAttribute.tcpip_nodelay, True)
        sock = self._backend_socket()
        if sock is not None:
            with contextlib.suppress(OSError):
                sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        sessions = getattr(inst.visalib, "sessions", None)
        backend = sessions.get(inst.session) if isinstance(sessions, dict) else None
        if backend is not None and hasattr(backend, "max_recv_size"):
            backend.max_recv_size = FAST_RECV_SIZE


class _Dropped(Exception):
    """Internal: the connection dropped (the cause holds the original error)."""
