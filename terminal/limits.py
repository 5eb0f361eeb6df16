"""Every bound of the stack, in one place.

Two kinds of limit live here.  *Wire maxima* are fixed by the frame formats
(a field's width caps them); no configuration can raise them.  *Link limits*
are the budgets one deployment chooses, collected in :class:`Limits`; their
defaults fit a small microcontroller (a few kilobytes of RAM for the whole
stack).  Every value says why it is what it is.
"""

from __future__ import annotations

import dataclasses

from ionotrail.terminal.errors import UsageError

# --- wire maxima (fixed by the formats in ionotrail.terminal.wire.formats) -------------
#
# This module cannot import the declarations it bounds, so the sizes below that
# a declaration also fixes (CRC trailers, the fragment header and overhead, the
# smallest frame, the range count, the message CRC) are checked against the declarations when
# ionotrail.terminal.wire loads (wire/layout.py, check_limits), which refuses
# to load on a mismatch.

FORMAT_VERSION = 1
"""Format version carried in the high nibble of every frame's first byte."""

FRAME_CRC_BYTES = 2
"""CRC-16/IBM-3740 trailer on every frame."""

MESSAGE_CRC_BYTES = 4
"""CRC-32C trailer on every reassembled message."""

FRAGMENT_HEADER_BYTES = 8
"""Data-fragment header: head, terminal, master, message id, position."""

FRAGMENT_OVERHEAD_BYTES = FRAGMENT_HEADER_BYTES + FRAME_CRC_BYTES
"""Frame bytes of a data fragment beyond its payload (10): header and CRC."""

MAX_FRAGMENT_PAYLOAD = 256
"""Largest fragment payload.  256 bytes take 0.26 s at 8 kbit/s, about one
power-decay constant of a typical underdense trail; a longer frame would
rarely survive the opening that carries it (common practice, no source)."""

MAX_FRAME_BYTES = FRAGMENT_HEADER_BYTES + MAX_FRAGMENT_PAYLOAD + FRAME_CRC_BYTES
"""Largest frame of any type (266).  Receivers refuse longer input before
looking at it, so one receive buffer of this size serves every frame."""

MIN_FRAME_BYTES = 1 + FRAME_CRC_BYTES
"""Type byte plus CRC: nothing shorter can be a frame."""

OFFSET_BITS = 13
MAX_MESSAGE_STREAM = 1 << OFFSET_BITS
"""Fragment offsets are 13 bits, so a sealed message (payload plus its
CRC-32C) is at most 8192 bytes on the wire."""

MAX_MESSAGE_PAYLOAD = MAX_MESSAGE_STREAM - MESSAGE_CRC_BYTES
"""Largest application payload the format can carry (8188 bytes)."""

MAX_ACK_RANGES = 15
"""A 4-bit count: at most 15 held ranges per acknowledgement (65 bytes)."""

MAX_COMMAND_BYTES = 64
"""Downlink command arguments and reply results.  Commands set a reporting
interval or a threshold; 64 bytes is ample and keeps a probe short."""

MESSAGE_ID_BITS = 16
MAX_ID_SPAN = 1 << (MESSAGE_ID_BITS - 1)
"""Ids in flight from one sender must span less than half the 16-bit id
space, or a receiver cannot tell old from new after wrap-around (the
selective-repeat bound, window <= 2^(n-1); from memory of any data-link
textbook)."""

OUTCOMES_KEPT = 64
"""Settled-fragment records (size, lost) a sender keeps for its fragment
policy; the link reads them after every acknowledgement, so a few suffice."""

# --- host-modem records (declared in ionotrail.terminal.modem.records) ------------
#
# The sizes below that the record declarations also fix are checked against
# them when ionotrail.terminal.modem loads (records.py, check_limits).

RECORD_VERSION = 1
"""Record format version carried in the high nibble of every record's first byte."""

MAX_RECORD_FRAME_BYTES = MAX_FRAME_BYTES
"""Air frame carried by a transmit, probe-start or received record: one frame
of this stack's largest (266 bytes).  A modem that does not read the frames it
carries still needs one bound for its buffers; this is it."""

MAX_RECORD_METADATA_BYTES = 17
"""Bytes of the largest record beyond its air frame: a received record's head,
modem time, SNR, frequency offset and CRC (1 + 8 + 2 + 4 + 2)."""

MAX_SERIAL_PAYLOAD = MAX_RECORD_FRAME_BYTES + MAX_RECORD_METADATA_BYTES
"""Largest host-modem record before COBS (283 bytes): a received record with a
maximal frame.  Checked at import to be the largest record any declaration
allows, so one receive buffer of this size serves every record."""

MAX_MODEM_TIME_US = 1 << 50
"""Modem clock readings, in microseconds (a 64-bit field on the wire): 2^50 us
is 35.7 years of uptime, beyond any modem's time between resets, and below it
a reading survives the trip to float seconds and back exactly (a double's 53
bits leave three to spare for the rounding of the division by 10^6)."""

MAX_MODEM_DRIFT = 1e-3
"""Largest clock drift the modem-clock estimate believes (1000 ppm).  Crystal
and TCXO oscillators are specified within about +-100 ppm over temperature and
ageing; a slope ten times that comes from too few readings, not from the
oscillator (common practice, no source)."""

MODEM_CLOCK_WINDOW = 32
"""Readings of the modem clock kept for the offset and drift estimate (the
vertices of their lower envelope).  The envelope of randomly delayed readings
keeps few vertices (at most 17 over 100,000 simulated readings a second
apart, delayed 0-20 ms, within the hour's horizon); 32 pairs of floats is 512 bytes."""

MODEM_CLOCK_HORIZON_S = 3600.0
"""Seconds of modem time after which a kept reading is forgotten: an
oscillator's drift follows its temperature, which changes over hours, so an
hour of readings describes the drift now (common practice, no source)."""

MODEM_CLOCK_MIN_SPAN_S = 10.0
"""Modem seconds the kept readings must span before a drift is estimated.  Over
a shorter span the serial delay's jitter (milliseconds) dominates the slope;
until then the drift is taken as zero and only the offset is estimated."""

MAX_KISS_FRAME_BYTES = 1 + MAX_RECORD_FRAME_BYTES
"""Unescaped bytes of a KISS frame: the port-and-command byte and one air
frame.  A KISS receiver holds at most this many; a longer frame is dropped."""


def cobs_encoded_max(payload_len: int) -> int:
    """Longest COBS encoding of ``payload_len`` bytes, without the delimiter.

    COBS adds one code byte per started block of 254 data bytes
    (Cheshire and Baker, IEEE/ACM Trans. Networking 7(2), 1999).
    """
    return payload_len + payload_len // 254 + 1


# --- the serial port to a modem (terminal/ports/serial.py) ---------------------

BACKOFF_INITIAL_S = 0.1
"""First wait before reopening a vanished modem.  A USB-serial adapter takes
a fraction of a second to re-enumerate after a replug; trying sooner only
fails again (common practice, no source)."""

BACKOFF_MAX_S = 5.0
"""Longest wait between reopening attempts: a modem plugged back in by hand
is in service again within a few seconds (common practice, no source)."""

BACKOFF_JITTER = (0.5, 1.0)
"""Each wait is the exponential delay times a factor drawn from this range,
so that hosts restarted together do not retry in lockstep ("equal jitter",
common practice, no source)."""

WRITE_BACKLOG_MAX_BYTES = 4096
"""Bytes the port holds unwritten when the modem stops reading (a stalled
line) before it drops further frames: a few maximal records, a fraction of a
second at 115200 bit/s.  Dropped frames are counted; the protocol above
retransmits them."""

CLOSE_TIMEOUT_S = 2.0
"""How long the serial port's close waits for the port's executor close."""


# --- power (terminal/power) ---------------------------------------------------

DUTY_INTERVALS_MAX = 32
"""Keyed intervals a duty-cycle ledger holds (16 bytes each); past this the
oldest two merge, which overstates airtime and so keeps the limit safe."""

RATE_BINS = 24
"""Usable-burst rate bins: one per hour of the day (UTC; at a fixed site local
solar time is a shift of it, and meteor rates follow solar time: the Earth's
rotation into the meteoroid stream)."""

RATE_MEMORY_S = 10 * 3600.0
"""Listening seconds a rate bin remembers: past this its counts are scaled
down together, so the rate follows the season (ten hours of listening per
hour of the day, a few weeks at a modest duty cycle)."""

# --- durable records (terminal/outbox) ----------------------------------------

STORE_RECORD_VERSION = 1
"""First byte of every record the core asks a store to keep."""

ID_RESERVATION = 16
"""Message ids reserved per write of the id counter (RFC 4303 s5 style: before
using ids at or above the saved ceiling R, the outbox saves R + 16; after a
reboot it goes on from the saved value).  A reboot wastes at most 16 ids, well
inside the receiver's duplicate window, and the counter is rewritten once per
16 messages instead of with every one."""

MAX_DELIVERY_EXPORT = 256
"""Log entries read from a store at a time when catching up an export."""

STORE_RETRY_FIRST_S = 1.0
"""A master whose store refuses a commit goes quiet (no probes, no listening,
so nothing it has not kept is acknowledged and nothing new piles up in memory)
and tries the commit again this many seconds later (common practice, no source)."""

STORE_RETRY_MAX_S = 60.0
"""The pause between a quiet master's tries doubles up to this (common practice, no source)."""

STORE_BUSY_TIMEOUT_S = 5.0
"""Seconds an SQLite store waits for a lock another process holds before the
commit fails (the sqlite3 module's own default, made explicit)."""

# --- link limits (per deployment, overridable) --------------------------------


@dataclasses.dataclass(frozen=True, slots=True)
class Limits:
    """Budgets one link chooses.  Construct with keyword overrides;
    values outside what the wire can carry raise :class:`UsageError`."""

    max_message_payload: int = 4096
    """Largest message an application may queue.  4 KiB is a day of 15-minute
    readings from a dozen sensors; the wire allows up to 8188."""

    max_fragment_payload: int = MAX_FRAGMENT_PAYLOAD
    """Largest payload the sender puts in one fragment."""

    max_queued_messages: int = 32
    """Messages a sender holds until acknowledged: a day of hourly reports
    with room for alarms; 32 x 4 KiB is the worst case a durable outbox holds."""

    duplicate_window: int = 64
    """Completed message ids remembered per source, RFC 4303 style (s3.4.3:
    32 must be supported, 64 is the usual default).  A sender never has ids
    in flight that span more than this, so any retransmission, however late,
    lands inside the receiver's window."""

    max_duplicate_sources: int = 64
    """Streams (terminal, master, direction) with a remembered window; duplicate
    rejection holds for this many.  A terminal hears a few masters; a master
    serving thousands of terminals must raise it to at least their number (8 bytes each)."""

    max_partials_per_source: int = 4
    """Messages one source may have half-reassembled at once."""

    max_partials_total: int = 16
    """Half-reassembled messages across all sources."""

    max_bytes_per_source: int = 8 * 1024
    """Reassembly buffer per source: two default-size messages."""

    max_bytes_total: int = 16 * 1024
    """Reassembly buffer across all sources: affordable on a 64 KiB part."""

    max_ranges_per_message: int = MAX_ACK_RANGES
    """Held ranges (islands between holes) per message; an acknowledgement
    must describe them all, so at most the 15 an ack block carries."""

    reassembly_lifetime: float = 4 * 3600.0
    """Seconds from a message's first fragment until an incomplete message is
    dropped (not restarted by later fragments, as RFC 8200 s4.5 has it).
    Openings come a few times a minute but a large message may need dozens,
    with nights of low meteor rates between; four hours spans that."""

    turnaround: float = 0.010
    """Seconds from hearing a probe to the first transmitted bit: the radio's
    receive-to-transmit switch and synthesiser settling, about 10 ms in VHF
    data radios (common practice, no source)."""

    burst_silence: float = 0.25
    """Seconds without a probe after which the terminal ends its burst and
    goes back to listening: two and a half of the master's probe intervals
    (0.1 s), so one lost probe does not end a live burst."""

    ack_margin: float = 0.005
    """Seconds by which a fragment must have left the antenna before an
    acknowledgement issued then is taken to prove it lost: the master's
    decode and queueing latency (about a millisecond in software), with room."""

    max_unconfirmed_pieces: int = 64
    """Fragments of one message a sender tracks until each is confirmed or
    shown lost (a probe's acknowledgement settles them within a tenth of a
    second in a burst); past this the oldest count as lost and go again."""

    max_remembered_commands: int = 8
    """Replies a terminal keeps for the newest commands it executed, so a
    command the master repeats (its probe repeats it until a reply arrives)
    is answered again without being executed again (about 70 bytes each)."""

    command_window: int = 64
    """Downlink command ids a terminal remembers as executed, as an RFC 4303
    anti-replay window (s3.4.3: 32 must be supported, 64 is the usual
    default) over the 8-bit id, so at most 2^(8-1) = 128.  The master issues a
    terminal's next command id only after the last one's reply, so it never
    runs ahead of the window; a command id seen within it is never executed twice."""

    max_queued_replies: int = 4
    """Replies a terminal holds waiting for airtime.  The oldest is dropped
    when a new one would exceed this (counted); the master repeats a command
    until its reply arrives, and the kept reply is sent again then."""

    probe_interval: float = 0.1
    """Seconds between the starts of the master's probes: a 7-byte probe at
    4800 bit/s is on the air 12 ms, so the master still listens most of the
    time, and a terminal learns of an opening within 0.1 s (common practice,
    no source)."""

    max_queued_commands: int = 16
    """Downlink commands a master holds until each is answered; one is on the
    air at a time, the rest wait their turn."""

    command_turn: float = 60.0
    """Seconds a command polls its terminal (keeping every other terminal
    quiet) before it yields: it goes to the back of the queue and for as long
    again no terminal is polled, so a terminal that is gone, or whose path
    is closed, cannot silence the others for more than half the time.  A
    minute spans a few openings at typical rates (common practice, no source)."""

    max_ack_news: int = 16
    """Messages a master holds acknowledgement news for (a fragment changed
    what it holds), to announce on its next probes one message per probe
    interval, oldest news first; past this the oldest news is dropped (the
    terminal's next fragment of that message brings it back)."""

    def __post_init__(self) -> None:
        for name in ("turnaround", "burst_silence", "ack_margin"):
            value = getattr(self, name)
            if not isinstance(value, (int, float)) or isinstance(value, bool) or not 0 <= value <= 60:
                raise UsageError(f"limit {name}={value!r} must be a number of seconds from 0 to 60")
        _within("max_remembered_commands", self.max_remembered_commands, 1, 256)
        _within("command_window", self.command_window, 1, 128)
        _within("max_queued_replies", self.max_queued_replies, 1, 256)
        _within("max_queued_commands", self.max_queued_commands, 1, 1 << 16)
        _within("max_ack_news", self.max_ack_news, 1, 1 << 16)
        if not isinstance(self.command_turn, (int, float)) or isinstance(self.command_turn, bool) or not 0 < self.command_turn <= 86400:
            raise UsageError(f"limit command_turn={self.command_turn!r} must be a number of seconds above 0, at most a day")
        if not isinstance(self.probe_interval, (int, float)) or isinstance(self.probe_interval, bool) or not 0.001 <= self.probe_interval <= 60:
            raise UsageError(f"limit probe_interval={self.probe_interval!r} must be a number of seconds from 0.001 to 60")
        _within("max_unconfirmed_pieces", self.max_unconfirmed_pieces, 1, 1 << 16)
        _within("max_message_payload", self.max_message_payload, 1, MAX_MESSAGE_PAYLOAD)
        _within("max_fragment_payload", self.max_fragment_payload, 1, MAX_FRAGMENT_PAYLOAD)
        _within("max_queued_messages", self.max_queued_messages, 1, MAX_ID_SPAN)
        _within("duplicate_window", self.duplicate_window, 1, MAX_ID_SPAN)
        _within("max_duplicate_sources", self.max_duplicate_sources, 1, 1 << 20)
        _within("max_partials_per_source", self.max_partials_per_source, 1, 1 << 16)
        _within("max_partials_total", self.max_partials_total, self.max_partials_per_source, 1 << 20)
        sealed = self.max_message_payload + MESSAGE_CRC_BYTES
        _within("max_bytes_per_source", self.max_bytes_per_source, sealed, 1 << 30)
        _within("max_bytes_total", self.max_bytes_total, self.max_bytes_per_source, 1 << 32)
        _within("max_ranges_per_message", self.max_ranges_per_message, 1, MAX_ACK_RANGES)
        if not isinstance(self.reassembly_lifetime, (int, float)) or not self.reassembly_lifetime > 0:
            raise UsageError(f"limit reassembly_lifetime={self.reassembly_lifetime!r} must be a positive number of seconds")

    @property
    def max_sealed_message(self) -> int:
        """Largest sealed message (payload plus CRC-32C) this link accepts."""
        return self.max_message_payload + MESSAGE_CRC_BYTES


def _within(name: str, value: int, low: int, high: int) -> None:
    if not isinstance(value, int) or isinstance(value, bool) or not low <= value <= high:
        raise UsageError(f"limit {name}={value!r} must be an integer from {low} to {high}")


DEFAULT_LIMITS = Limits()


# --- authentication (terminal/auth, docs/keys.md) -----------------------------

AUTH_KEY_BYTES = 32
"""Every secret: the site secret, a terminal's root key and each working key.
HMAC-SHA-256 keys of the hash's output length (RFC 2104 s3: less than L
bytes is discouraged, more adds nothing), and HKDF-SHA256's output length."""

AUTH_TAG_BYTES = 8
"""Truncated HMAC-SHA-256 tag on an authenticated frame (64 bits).  RFC 2104
s5 asks for at least half the hash (128 bits) and at least 80 bits, shorter
only with a risk analysis; docs/keys.md gives it: a forgery succeeds with
probability 2^-64 per try, failed checks are counted, and the radio carries
a few frames a second at most, so 2^64 tries outlast any deployment."""

AUTH_MIN_TAG_BYTES = 8
"""Shortest tag a deployment may choose: the risk analysis of docs/keys.md
holds for 64 bits and no fewer."""

AUTH_REPLAY_WINDOW = 64
"""Authenticated frames a receiver remembers per stream, as an RFC 4303
anti-replay window (s3.4.3: 32 must be supported, 64 is the usual default);
8 bytes of bitmap per stream."""

AUTH_MAX_REPLAY_WINDOW = 1024
"""Largest anti-replay window a deployment may choose (128 bytes of bitmap);
RFC 6479 uses windows this large for links that reorder thousands of packets."""

AUTH_COUNTER_BITS = 32
"""Frame counters travel in full, 32 bits, and never wrap within one key
epoch: at one authenticated frame a second they last 136 years; a sender
that reaches the end must rotate to a new epoch first."""

AUTH_COUNTER_RESERVE = 256
"""Counters a sender reserves with one durable write (K of RFC 4303 s5): it
saves R + K before sending counter R, and after a reboot continues from the
saved value, so each reboot wastes at most 256 counters and the flash sees
one write per 256 frames sent."""

AUTH_EPOCH_BITS = 16
"""Key epochs are 16 bits: a rotation a day for 179 years.  A site that
reaches the last epoch issues a new site secret."""
