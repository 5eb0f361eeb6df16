"""Degradation as the battery falls, and recovery as it refills: one table.

Three levels of service.  NORMAL runs routine traffic as the listening
policy decides.  CONSERVE defers routine traffic and sends it in batches.
ALARMS_ONLY keeps the receiver off except to send an alarm.  The state of
charge falls into one of five bands; the two *edge* bands, each
``hysteresis`` wide above a threshold, are where a level keeps itself, so a
battery hovering at a threshold does not flip the level at every decision.

:data:`TRANSITIONS` maps (level, band) to the next level.  Every pair can
happen, so every pair has a cell; :func:`classify` turns a state of charge
into a band and never looks at the table.
"""

from __future__ import annotations

import enum

from ionotrail.terminal.errors import ProtocolError


class Level(enum.Enum):
    NORMAL = "normal"
    """Routine traffic as the listening policy decides."""
    CONSERVE = "conserve"
    """Routine traffic deferred and sent in batches."""
    ALARMS_ONLY = "alarms only"
    """Receiver off except to send an alarm."""


class Band(enum.Enum):
    HIGH = "at or above conserve + hysteresis"
    CONSERVE_EDGE = "from conserve to conserve + hysteresis"
    LOW = "from reserve + hysteresis to conserve"
    RESERVE_EDGE = "from reserve to reserve + hysteresis"
    DEPLETED = "below reserve"


L, B = Level, Band
TRANSITIONS: dict[tuple[Level, Band], Level] = {
    # Falling: a level drops as soon as its threshold is crossed.
    (L.NORMAL, B.HIGH): L.NORMAL,
    (L.NORMAL, B.CONSERVE_EDGE): L.NORMAL,
    (L.NORMAL, B.LOW): L.CONSERVE,
    (L.NORMAL, B.RESERVE_EDGE): L.CONSERVE,
    (L.NORMAL, B.DEPLETED): L.ALARMS_ONLY,
    # Conserving: back to normal only clear of the edge; alarms only below the reserve.
    (L.CONSERVE, B.HIGH): L.NORMAL,
    (L.CONSERVE, B.CONSERVE_EDGE): L.CONSERVE,
    (L.CONSERVE, B.LOW): L.CONSERVE,
    (L.CONSERVE, B.RESERVE_EDGE): L.CONSERVE,
    (L.CONSERVE, B.DEPLETED): L.ALARMS_ONLY,
    # Alarms only: rising, a level returns only clear of its threshold's edge.
    (L.ALARMS_ONLY, B.HIGH): L.NORMAL,
    (L.ALARMS_ONLY, B.CONSERVE_EDGE): L.CONSERVE,
    (L.ALARMS_ONLY, B.LOW): L.CONSERVE,
    (L.ALARMS_ONLY, B.RESERVE_EDGE): L.ALARMS_ONLY,
    (L.ALARMS_ONLY, B.DEPLETED): L.ALARMS_ONLY,
}
del L, B


def decide(level: Level, band: Band) -> Level:
    try:
        return TRANSITIONS[(level, band)]
    except KeyError:
        raise ProtocolError(f"the power levels cannot take band {band.name} at level {level.name}") from None


def classify(soc: float, *, reserve: float, conserve: float, hysteresis: float) -> Band:
    """The band of state of charge ``soc`` for thresholds given as states of charge."""
    if soc < reserve:
        return Band.DEPLETED
    if soc < reserve + hysteresis:
        return Band.RESERVE_EDGE
    if soc < conserve:
        return Band.LOW
    if soc < conserve + hysteresis:
        return Band.CONSERVE_EDGE
    return Band.HIGH
