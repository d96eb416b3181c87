"""Run layer: the instrument roles it drives (``roles``), one run's context and the steps
shared by the production sequence and the characterisation (``steps``), safety, decision
rules, the sequence, the characterisation and the production line.

It uses the layers below it (README, "Layout of the code") and never talks SCPI itself
(only driver calls).
"""

from __future__ import annotations

import logging

logging.getLogger("harness.run").addHandler(logging.NullHandler())
