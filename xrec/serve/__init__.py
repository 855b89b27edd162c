"""``xrec serve``: an HTTP JSON service over one bundle folder (Starlette on uvicorn).

Endpoints (JSON bodies; every refusal is a 4xx answer ``{"error": message, "field": name}``)
--------------------------------------------------------------------------------------------
``GET /health``
    ``{"status": "ok", "bundle": <id>}``.
``GET /bundle``
    The served bundle's identity: ``bundle`` (SHA-256 of its manifest), dataset name and
    fingerprint, method, sources with weights and normalizers, the ranking digest
    (``check``), the ``evidence`` (scorecard) it was chosen on, filterable columns, and
    which sources compare items or take text queries.
``POST /recommend``
    ``{"user": "u1", "k": 10, "filters": {...}, "exclude_seen": true, "unknown_user": "error"}``
    → ``{"user", "known_user", "items": [{"item", "score", "rank"}], "bundle"}``.
    ``unknown_user``: ``"error"`` (404 for an unknown user) or ``"popular"``.
``POST /similar``
    ``{"item": "p0001", "k": 10, "source": null, "filters": {...}}``: items like an item, by one
    source (``"image"``, ``"text"``, ``"als"``, ...) or blended (``null``).
``POST /search``
    ``{"text": "a red mug", "k": 10, "source": null, "filters": {...}}``: items matching a text,
    through a text source or a cross-modal source's bridge.
``POST /reload``
    Load the bundle folder again and swap it in; in-flight requests finish on the old one.
    A bundle that fails verification is refused (409) and the old one keeps serving.
    ``kill -HUP <pid>`` does the same.

Limits: bodies up to :data:`MAX_BODY` bytes (413 beyond), ``k`` from 1 to :data:`MAX_K`;
filters as in :mod:`xrec.bundle._filters`; unknown users and items give 404, malformed
fields 400, each naming the field.
"""

from __future__ import annotations

import signal
import threading
from pathlib import Path

from xrec.serve._app import MAX_BODY, MAX_K, BundleHolder, RequestError, create_app, describe

__all__ = ["MAX_BODY", "MAX_K", "BundleHolder", "RequestError", "create_app", "describe", "serve"]


def serve(bundle: str | Path, *, host: str = "127.0.0.1", port: int = 8000, log_level: str = "warning") -> None:
    """Serve a bundle folder over HTTP until interrupted (Ctrl+C or SIGTERM); SIGHUP reloads it.

    Parameters
    ----------
    bundle
        A folder written by :func:`xrec.bundle.save_bundle` (verified before serving).
    host
        Address to bind; the default answers this machine only.
    port
        TCP port.
    log_level
        uvicorn's log level (``"info"`` also logs every request).
    """
    import uvicorn
    from threadpoolctl import threadpool_limits

    holder = BundleHolder(bundle)
    app = create_app(holder)
    if hasattr(signal, "SIGHUP"):
        # the reload runs beside the event loop, so requests keep being answered meanwhile
        signal.signal(signal.SIGHUP, lambda *_: threading.Thread(target=holder.reload_logged, daemon=True).start())
    # Requests are scored one user at a time, side by side: one BLAS thread per request is
    # several times faster than threads that contend for the same cores.
    with threadpool_limits(1, "blas"):
        uvicorn.run(app, host=host, port=port, log_level=log_level, access_log=log_level in ("info", "debug", "trace"))
