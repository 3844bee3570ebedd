"""Which Urms(1/2) windows lie inside a dip, swell or interruption, for the flag.

IEC 61000-4-30 Ed.3 clause 4.7 flags every aggregation interval in which a dip, swell or
interruption occurred (from memory, tests/SOURCES.md). An event lasts from the window that crossed
the threshold until the first window that recovered past threshold + hysteresis (clause 5.4), so
the flag must cover the hysteresis tail too: a window between the dip threshold and threshold +
hysteresis is inside the event when the event is still open. The latch below mirrors the event
detector's dip and swell rules (:mod:`agent.events.detector`) row for row, so every interval that
overlaps an open event is flagged.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

F64 = npt.NDArray[np.float64]
B1 = npt.NDArray[np.bool_]


def latch(set_rows: B1, reset_rows: B1, state0: bool) -> B1:
    """State of a set/reset latch after each row [bool].

    ``set_rows`` and ``reset_rows`` never hold in the same row; a row with neither keeps the
    previous state (``state0`` before the first row).
    """
    n = set_rows.shape[0]
    changed = set_rows | reset_rows
    last = np.where(changed, np.arange(n), -1)
    np.maximum.accumulate(last, out=last)
    return np.where(last >= 0, set_rows[np.maximum(last, 0)], state0)


def event_window_flags(urms: F64, dip_v: float, dip_end_v: float, swell_v: float,
                       swell_end_v: float, in_dip: bool, in_swell: bool
                       ) -> tuple[B1, bool, bool]:
    """Windows that belong to a dip (interruptions included) or a swell.

    Parameters
    ----------
    urms : (n, channels) [V] Urms(1/2) values in time order
    dip_v, dip_end_v : [V] dip threshold and dip threshold + hysteresis
    swell_v, swell_end_v : [V] swell threshold and swell threshold - hysteresis
    in_dip, in_swell : whether a dip / swell is open before the first row

    Returns
    -------
    (flags per row, in_dip after the last row, in_swell after the last row)

    References
    ----------
    IEC 61000-4-30 Ed.3 cl. 4.7 (flagging, from memory) and cl. 5.4 (dip and swell start and
    end with hysteresis; polyphase: starts on any channel, ends when all have recovered).
    """
    n = urms.shape[0]
    if n == 0:
        return np.zeros(0, dtype=bool), in_dip, in_swell
    # No latch open and no row that could set one (most blocks): nothing is flagged.
    if not in_dip and not in_swell and swell_v >= float(urms.max()) and float(urms.min()) >= dip_v:
        return np.zeros(n, dtype=bool), False, False
    dip = latch(np.asarray((urms < dip_v).any(axis=1)),
                np.asarray((urms >= dip_end_v).all(axis=1)), in_dip)
    swell = latch(np.asarray((urms > swell_v).any(axis=1)),
                  np.asarray((urms <= swell_end_v).all(axis=1)), in_swell)
    return dip | swell, bool(dip[-1]), bool(swell[-1])
