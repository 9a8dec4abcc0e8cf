"""The one list of the serial link's counters, shared by the reader, the recorder and ``inspect``.

A counter added here is counted by :class:`acquire.link.reader.SerialReader`
and recorded in ``/counters`` (with the decoder's ``drop_<cause>`` counters and
the recorder's own ``ring_lost_frames``) without any other change.
"""
from __future__ import annotations

__all__ = ["LINK_COUNTER_NAMES"]

#: counters of :class:`acquire.link.reader.SerialReader`, in the order recorded
LINK_COUNTER_NAMES = (
    "frames",               # frames received
    "frames_lost",          # frames the sequence numbers say never arrived
    "late_frames",          # frames the device flagged as taken late (ADC overrun)
    "tx_overflow_frames",   # frames after which the device's transmit buffer overflowed
    "reconnects",           # times the port was reopened
    "reboots",              # times the device restarted its counters
    "seq_discontinuities",  # zero or backward steps of the sequence number
    "bytes",                # bytes read from the port
)
