"""The modem as the service sees it: one small interface, several adapters.

A port sends frames, reports the frames it receives with what the modem
measured (:class:`~ionotrail.terminal.link.terminal.Arrival`: arrival time on the event loop's
clock, SNR, frequency offset), and can be asked to start or stop listening
and probing.  Probing is a stream the port owns, as a real modem does it in
hardware: the master hands it a probe frame and an interval, and replaces the
frame whenever its content (acknowledgement, poll, command) changes.  A
simulated port reports only the probes the channel delivers, so silence costs
nothing.

Adapters: :class:`ionotrail.harness.emulators.air.SimulatedPort` over the channel simulator, and
:class:`ionotrail.terminal.ports.serial.SerialPort`, a radio modem on a serial line (a device, a
pseudo-terminal or a TCP socket) speaking a host-modem dialect.  The service cannot tell them apart.
"""

from __future__ import annotations

import abc
from collections.abc import Callable

from ionotrail.terminal.link.terminal import Arrival

Listener = Callable[[Arrival], None]


class Port(abc.ABC):
    """A modem attached to an asyncio event loop."""

    @abc.abstractmethod
    def attach(self, listener: Listener) -> None:
        """Call ``listener`` (on the loop) for every frame received from now on."""

    @abc.abstractmethod
    def send(self, frame: bytes) -> None:
        """Transmit ``frame`` now, or right after the frame already on the air."""

    @abc.abstractmethod
    def start_listening(self) -> None:
        """Turn the receiver on."""

    @abc.abstractmethod
    def stop_listening(self) -> None:
        """Turn the receiver off (a terminal saving power)."""

    @abc.abstractmethod
    def start_probing(self, frame: bytes, interval: float) -> None:
        """Transmit ``frame`` every ``interval`` seconds until stopped; calling
        again replaces the frame from the next probe on."""

    @abc.abstractmethod
    def stop_probing(self) -> None:
        """End the probe stream."""

    @abc.abstractmethod
    async def close(self) -> None:
        """Release the modem; nothing is reported afterwards."""
