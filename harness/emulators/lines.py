"""The host side of an emulated modem: the serial line a host program opens.

Three kinds, one small interface (:class:`Line`):

* :class:`PtyLine`: a pseudo-terminal pair in raw mode; the host opens the
  slave, whose path is published as a stable symbolic link.  The emulator
  keeps its own slave descriptor open, so a host may close and reopen the
  path at will.  An unplug closes both descriptors (the host's descriptor
  then reads EIO, as an unplugged USB adapter does) and removes the link; a
  replug makes a fresh pair and re-points the link at it.
* :class:`TcpLine`: a listener on the loopback interface only; one host at a
  time (a new connection replaces the old one), reachable with pyserial's
  ``socket://127.0.0.1:PORT``.  An unplug closes the connection and the
  listener; a replug listens again on the same port.
* :class:`DeviceLine`: an existing serial device (a development board on a
  USB-serial adapter); an unplug closes the device, a replug reopens it.

Writes never block the loop: bytes the host does not take in time (a full
pty or socket buffer, no host attached) are dropped and counted, as a UART
drops what nobody reads.
"""

from __future__ import annotations

import abc
import asyncio
import contextlib
import os
import tty
from collections.abc import Callable
from pathlib import Path

import serial

DataCallback = Callable[[bytes], None]
READ_CHUNK = 4096
TCP_BUFFER_MAX = 1 << 16
"""Bytes queued towards a TCP host before further writes are dropped (a slow
host behaves like a full UART buffer, not like unbounded memory)."""


class Line(abc.ABC):
    """One station's serial line, seen from the modem."""

    dropped_bytes: int = 0

    @property
    @abc.abstractmethod
    def address(self) -> str:
        """What a host opens: a path or a pyserial URL."""

    @abc.abstractmethod
    async def open(self, on_data: DataCallback) -> None:
        """Start; ``on_data`` is called on the loop with every chunk the host sends."""

    @abc.abstractmethod
    def write(self, data: bytes) -> None:
        """Send towards the host without blocking; what cannot be sent is dropped and counted."""

    @abc.abstractmethod
    def unplug(self) -> None:
        """The line disappears (an unplugged adapter)."""

    @abc.abstractmethod
    async def replug(self) -> None:
        """The line comes back at the same address."""

    @abc.abstractmethod
    async def close(self) -> None:
        """Release everything; nothing is read or written afterwards."""


class PtyLine(Line):
    """A pseudo-terminal whose slave path is published as the symbolic link ``link``."""

    def __init__(self, link: Path) -> None:
        self.link = Path(link)
        self._master: int | None = None
        self._slave: int | None = None
        self._on_data: DataCallback | None = None
        self.device = ""
        """The current slave device (e.g. /dev/pts/7); the link points at it."""

    @property
    def address(self) -> str:
        return str(self.link)

    async def open(self, on_data: DataCallback) -> None:
        self._on_data = on_data
        self._plug()

    def _plug(self) -> None:
        master, slave = os.openpty()
        tty.setraw(slave)  # no echo, no line editing, 8-bit clean
        os.set_blocking(master, False)
        self._master, self._slave = master, slave
        self.device = os.ttyname(slave)
        fresh = self.link.with_name(self.link.name + ".new")
        with contextlib.suppress(FileNotFoundError):
            fresh.unlink()
        os.symlink(self.device, fresh)
        os.replace(fresh, self.link)  # atomic: the path never points nowhere while plugged
        asyncio.get_running_loop().add_reader(master, self._readable)

    def _readable(self) -> None:
        if self._master is None:
            return
        try:
            data = os.read(self._master, READ_CHUNK)
        except (BlockingIOError, InterruptedError):
            return
        except OSError:  # the pair broke underneath us: behave as unplugged until replugged
            self._unplug_quietly()
            return
        if data and self._on_data is not None:
            self._on_data(data)

    def write(self, data: bytes) -> None:
        if self._master is None:
            self.dropped_bytes += len(data)
            return
        try:
            sent = os.write(self._master, data)
        except (BlockingIOError, InterruptedError):
            sent = 0
        except OSError:
            sent = 0
        self.dropped_bytes += len(data) - sent

    def unplug(self) -> None:
        self._unplug_quietly()
        with contextlib.suppress(FileNotFoundError):
            self.link.unlink()

    def _unplug_quietly(self) -> None:
        if self._master is not None:
            asyncio.get_running_loop().remove_reader(self._master)
            os.close(self._master)
            self._master = None
        if self._slave is not None:
            os.close(self._slave)
            self._slave = None

    async def replug(self) -> None:
        if self._master is None:
            self._plug()

    async def close(self) -> None:
        self.unplug()
        self._on_data = None


class TcpLine(Line):
    """A TCP listener on 127.0.0.1 (only loopback: the emulator is no network service)."""

    HOST = "127.0.0.1"

    def __init__(self, port: int = 0) -> None:
        self.port = port
        self._server: asyncio.Server | None = None
        self._writer: asyncio.StreamWriter | None = None
        self._on_data: DataCallback | None = None
        self._tasks: set[asyncio.Task[None]] = set()

    @property
    def address(self) -> str:
        return f"socket://{self.HOST}:{self.port}"

    async def open(self, on_data: DataCallback) -> None:
        self._on_data = on_data
        await self._listen()

    async def _listen(self) -> None:
        self._server = await asyncio.start_server(self._connected, self.HOST, self.port, reuse_address=True)
        self.port = self._server.sockets[0].getsockname()[1]

    async def _connected(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        if self._writer is not None:
            self._writer.close()  # one host at a time: the newest wins
        self._writer = writer
        try:
            while True:
                data = await reader.read(READ_CHUNK)
                if not data:
                    break
                if self._on_data is not None and self._writer is writer:
                    self._on_data(data)
        except (ConnectionError, OSError):
            pass
        finally:
            if self._writer is writer:
                self._writer = None
            writer.close()

    def write(self, data: bytes) -> None:
        writer = self._writer
        if writer is None or writer.is_closing() or writer.transport.get_write_buffer_size() > TCP_BUFFER_MAX:
            self.dropped_bytes += len(data)
            return
        writer.write(data)

    def unplug(self) -> None:
        if self._writer is not None:
            self._writer.close()
            self._writer = None
        if self._server is not None:
            self._server.close()
            self._server = None

    async def replug(self) -> None:
        if self._server is None:
            await self._listen()

    async def close(self) -> None:
        server = self._server
        self.unplug()
        if server is not None:
            await server.wait_closed()
        self._on_data = None


class DeviceLine(Line):
    """An existing serial device; the emulator is the far end of the host's cable."""

    def __init__(self, path: str, baudrate: int = 115200) -> None:
        self.path = path
        self.baudrate = baudrate
        self._port: serial.Serial | None = None
        self._on_data: DataCallback | None = None

    @property
    def address(self) -> str:
        return self.path

    async def open(self, on_data: DataCallback) -> None:
        self._on_data = on_data
        self._plug()

    def _plug(self) -> None:
        port = serial.Serial(self.path, self.baudrate, timeout=0)
        os.set_blocking(port.fileno(), False)
        self._port = port
        asyncio.get_running_loop().add_reader(port.fileno(), self._readable)

    def _readable(self) -> None:
        if self._port is None:
            return
        try:
            data = os.read(self._port.fileno(), READ_CHUNK)
        except (BlockingIOError, InterruptedError):
            return
        except OSError:  # the adapter went away
            self.unplug()
            return
        if data and self._on_data is not None:
            self._on_data(data)

    def write(self, data: bytes) -> None:
        if self._port is None:
            self.dropped_bytes += len(data)
            return
        try:
            sent = os.write(self._port.fileno(), data)
        except OSError:
            sent = 0
        self.dropped_bytes += len(data) - sent

    def unplug(self) -> None:
        if self._port is not None:
            asyncio.get_running_loop().remove_reader(self._port.fileno())
            with contextlib.suppress(OSError, serial.SerialException):
                self._port.close()
            self._port = None

    async def replug(self) -> None:
        if self._port is None:
            self._plug()

    async def close(self) -> None:
        self.unplug()
        self._on_data = None
