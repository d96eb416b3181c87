"""Instruments layer: VISA sessions, SCPI profiles and role drivers (I/O through pyvisa only).

``scpi`` holds pure codecs shared with the simulated bench; ``config`` the station and
profile objects (their files are read by ``harness.io``); ``session`` owns one VISA
resource; ``drivers`` speak a role's operations through a profile; ``bench.connect`` opens
a whole station.
"""

from __future__ import annotations

import logging

logging.getLogger("harness.instruments").addHandler(logging.NullHandler())
