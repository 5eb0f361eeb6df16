"""The host-modem interface: records on the serial line, the dialects that
carry them, and the estimate of the modem's clock (all sans-I/O).

* :mod:`.records` declares every record and its frozen representation.
* :mod:`.dialects` turns records into line bytes and line bytes into records
  (ours: COBS, CRC, versioned; KISS: the TNC framing, frames only).
* :mod:`.clock` maps the modem's timestamps onto the host's clock.

docs/modem.md describes the interface for people who write modem firmware or
terminal software.
"""
