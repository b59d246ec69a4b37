"""The station view: a small read-only local web page with pushed live updates.

``ViewHub`` (``_hub.py``) holds what the page shows and fans out deltas; ``ViewServer``
(``_server.py``) serves the page, its assets (shipped in ``assets/``), ``/snapshot.json`` and a
server-sent event stream; ``_feeds.py`` adapts the runtime's ports to the hub. The page
supports, never replaces, the joint designer's specification, local codes and licensed
practice.
"""

from clampd.daemon.view._feeds import (
    BROKER_POLL_S,
    BoardPort,
    ResultSinkPort,
    ResultTee,
    StatusTee,
    follow_broker,
    station_view_of,
)
from clampd.daemon.view._hub import (
    CURVE_INTERVAL_S,
    MAX_LIVE_POINTS,
    QUEUE_BOUND,
    RECENT_RESULTS,
    RESULT_POINTS,
    JobView,
    JointView,
    Message,
    StationView,
    Subscription,
    ViewError,
    ViewHub,
    limits_of,
    station_view,
)
from clampd.daemon.view._server import (
    HEAD_TIMEOUT_S,
    HEARTBEAT_S,
    MAX_HEAD_BYTES,
    MAX_STREAMS,
    ViewServer,
    ViewServerError,
    load_assets,
)
from clampd.daemon.view._service import HasView, ViewService, announce_view

__all__ = [
    "BROKER_POLL_S",
    "CURVE_INTERVAL_S",
    "HEAD_TIMEOUT_S",
    "HEARTBEAT_S",
    "MAX_HEAD_BYTES",
    "MAX_LIVE_POINTS",
    "MAX_STREAMS",
    "QUEUE_BOUND",
    "RECENT_RESULTS",
    "RESULT_POINTS",
    "BoardPort",
    "HasView",
    "JobView",
    "JointView",
    "Message",
    "ResultSinkPort",
    "ResultTee",
    "StationView",
    "StatusTee",
    "Subscription",
    "ViewError",
    "ViewHub",
    "ViewServer",
    "ViewServerError",
    "ViewService",
    "announce_view",
    "follow_broker",
    "limits_of",
    "load_assets",
    "station_view",
    "station_view_of",
]
