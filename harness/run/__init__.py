"""Run layer: safety, decision rules and the test sequence.

It uses the layers below it (README, "Layout of the code") and never talks SCPI itself
(only driver calls).
"""

from __future__ import annotations

import logging

logging.getLogger("harness.run").addHandler(logging.NullHandler())
