"""The line page: a read-only web view of a results database for the line supervisor.

``stageproof web --db URL`` serves it (:mod:`harness.web.server`); :mod:`harness.web.line`
computes what it shows from the store; :mod:`harness.web.page` is the page itself.  A
layer above ``report``: it reads through the store and reuses the summary's statistics.
"""

from harness.web.line import LineQuery, line_status, resolve_window
from harness.web.server import LineServer, make_server

__all__ = ["LineQuery", "LineServer", "line_status", "make_server", "resolve_window"]
