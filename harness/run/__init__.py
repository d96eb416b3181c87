"""Run layer: fixture files, safety, decision rules and the test sequence.

Imports point down only: this package uses model, measure, instruments and store, and never
talks SCPI itself (only driver calls).
"""

from __future__ import annotations

import logging

logging.getLogger("harness.run").addHandler(logging.NullHandler())
