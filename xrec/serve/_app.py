"""The HTTP app: JSON endpoints over a loaded bundle, request checks, and atomic reload."""

from __future__ import annotations

import datetime as _dt
import json
import logging
import math
import threading
from collections.abc import Awaitable, Callable
from pathlib import Path
from typing import Any

from starlette.applications import Starlette
from starlette.concurrency import run_in_threadpool
from starlette.requests import Request
from starlette.responses import JSONResponse
from starlette.routing import Route

from xrec._jsonable import json_default
from xrec.errors import BundleError, ConfigError, DataError, XrecError

#: Largest request body accepted, in bytes.
MAX_BODY = 64 * 1024
#: Largest list length a request may ask for.
MAX_K = 1000

_log = logging.getLogger("xrec.serve")


class RequestError(Exception):
    """A request the service refuses: HTTP ``status``, the offending ``field`` and a message."""

    def __init__(self, status: int, field: str, message: str) -> None:
        super().__init__(message)
        self.status = status
        self.field = field
        self.message = message


class BundleHolder:
    """The bundle being served, swapped whole on reload.

    A request reads :attr:`current` once and uses that bundle to the end, so a reload never
    changes a request midway; a bundle failing verification is refused and the old one stays.
    """

    def __init__(self, path: str | Path) -> None:
        from xrec.bundle import load_bundle

        self.path = Path(path)
        self.current = load_bundle(self.path)
        self.loaded_at = _now()
        self.reloads = 0
        self.failed_reloads = 0
        self._reload_lock = threading.Lock()

    def reload(self) -> Any:
        """Load the bundle folder again and swap it in; raises :class:`BundleError` and keeps the old one on failure."""
        from xrec.bundle import load_bundle

        with self._reload_lock:  # one reload at a time; requests keep reading the old bundle meanwhile
            try:
                fresh = load_bundle(self.path)
            except XrecError:
                self.failed_reloads += 1
                raise
            except OSError as exc:
                self.failed_reloads += 1
                raise BundleError(f"bundle {str(self.path)!r}: {exc}") from None
            self.current = fresh
            self.loaded_at = _now()
            self.reloads += 1
            return fresh

    def reload_logged(self) -> None:
        """:meth:`reload`, logging instead of raising (for the SIGHUP handler)."""
        try:
            bundle = self.reload()
            _log.warning("reloaded bundle %s (%s)", self.path, bundle.identity[:16])
        except XrecError as exc:
            _log.warning("reload refused, still serving the previous bundle: %s", exc)


def create_app(bundle: str | Path | BundleHolder) -> Starlette:
    """The Starlette app serving one bundle folder (see :mod:`xrec.serve` for the endpoints).

    Parameters
    ----------
    bundle
        A bundle folder (loaded and verified now) or an existing :class:`BundleHolder`.
    """
    holder = bundle if isinstance(bundle, BundleHolder) else BundleHolder(bundle)

    async def health(request: Request) -> JSONResponse:
        return JSONResponse({"status": "ok", "bundle": holder.current.identity})

    async def identity(request: Request) -> JSONResponse:
        return _json(describe(holder))

    async def recommend(request: Request) -> JSONResponse:
        body = await _body(request)
        _keys(body, {"user", "k", "filters", "exclude_seen", "unknown_user"}, required={"user"})
        user = _id(body["user"], "user")
        k = _k(body.get("k", 10))
        filters = _filters(body)
        exclude_seen = _bool(body.get("exclude_seen", True), "exclude_seen")
        unknown = body.get("unknown_user", "error")
        if unknown not in ("error", "popular"):
            raise RequestError(400, "unknown_user", f"unknown_user: must be 'error' or 'popular', got {unknown!r}"[:300])
        current = holder.current
        if unknown == "error" and not current.has_user(user):
            raise RequestError(404, "user", f"user: unknown user {user!r} (pass \"unknown_user\": \"popular\" for a cold-start list)"[:300])
        top, scores = await run_in_threadpool(current.ranked, user, k, filters=filters, exclude_seen=exclude_seen, unknown=unknown)
        items = [
            {"item": str(item), "score": float(score), "rank": rank}
            for rank, (item, score) in enumerate(zip(current.item_ids[top].tolist(), scores.tolist(), strict=True), start=1)
        ]
        return JSONResponse({"user": user, "known_user": current.has_user(user), "items": items, "bundle": current.identity})

    async def similar(request: Request) -> JSONResponse:
        body = await _body(request)
        _keys(body, {"item", "k", "source", "filters"}, required={"item"})
        item = _id(body["item"], "item")
        k = _k(body.get("k", 10))
        filters = _filters(body)
        source = _optional_str(body.get("source"), "source")
        current = holder.current
        if item not in current.items.positions:
            raise RequestError(404, "item", f"item: unknown item {item!r}"[:300])
        frame = await run_in_threadpool(current.similar_items, item, k, source=source, filters=filters)
        return _json({"item": item, "source": source or "blend", "items": _records(frame), "bundle": current.identity})

    async def search(request: Request) -> JSONResponse:
        body = await _body(request)
        _keys(body, {"text", "k", "source", "filters"}, required={"text"})
        text = body["text"]
        if not isinstance(text, str):
            raise RequestError(400, "text", f"text: must be a string, got {type(text).__name__}")
        k = _k(body.get("k", 10))
        filters = _filters(body)
        source = _optional_str(body.get("source"), "source")
        current = holder.current
        try:
            frame = await run_in_threadpool(current.search_text, text, k, source=source, filters=filters)
        except (ImportError, OSError) as exc:  # the text encoder's package or files cannot be loaded
            raise RequestError(503, "source", f"source: the text encoder cannot be loaded here ({exc})"[:300]) from None
        chosen = source or current.default_search_source()
        return _json({"text": text, "source": chosen, "items": _records(frame), "bundle": current.identity})

    async def reload(request: Request) -> JSONResponse:
        body = await _body(request, allow_empty=True)
        _keys(body, set(), required=set())
        previous = holder.current.identity
        try:
            fresh = await run_in_threadpool(holder.reload)
        except XrecError as exc:
            raise RequestError(409, "bundle", f"reload refused, still serving {previous[:16]}: {exc}") from None
        return _json({"reloaded": True, "previous": previous, "bundle": fresh.identity})

    routes = [
        Route("/health", health, methods=["GET"]),
        Route("/bundle", identity, methods=["GET"]),
        Route("/recommend", _guarded(recommend), methods=["POST"]),
        Route("/similar", _guarded(similar), methods=["POST"]),
        Route("/search", _guarded(search), methods=["POST"]),
        Route("/reload", _guarded(reload), methods=["POST"]),
    ]
    app = Starlette(routes=routes)
    app.state.holder = holder
    return app


def describe(holder: BundleHolder) -> dict[str, Any]:
    """What ``GET /bundle`` answers: the served bundle's identity and what it was chosen on."""
    b = holder.current
    spec, manifest = b.spec, b.manifest
    sources = {}
    for name, src in spec.sources.items():
        entry: dict[str, Any] = {"kind": src.kind}
        if src.weight is not None:
            entry["weight"] = src.weight
        if src.normalizer is not None:
            entry["normalizer"] = src.normalizer
        if src.band_weights is not None:
            entry["band_weights"] = src.band_weights
        sources[name] = entry
    return {
        "bundle": b.identity,
        "path": str(holder.path),
        "loaded_at": holder.loaded_at,
        "reloads": holder.reloads,
        "failed_reloads": holder.failed_reloads,
        "created": manifest.get("created"),
        "written_by": manifest.get("written_by"),
        "dataset": manifest.get("dataset"),
        "method": spec.method,
        "method_params": spec.method_params,
        "sources": sources,
        "check": spec.check,
        "evidence": spec.evidence,
        "n_users": manifest.get("n_users"),
        "n_items": manifest.get("n_items"),
        "filterable": manifest.get("catalog"),
        "similarity_sources": b.similarity_sources(),
        "search_sources": b.search_sources(),
    }


# -- request reading and checking ------------------------------------------------------------------


def _guarded(handler: Callable[[Request], Awaitable[JSONResponse]]) -> Callable[[Request], Awaitable[JSONResponse]]:
    """Turn refusals (and xrec's own errors from deeper down) into 4xx JSON answers."""

    async def run(request: Request) -> JSONResponse:
        try:
            return await handler(request)
        except RequestError as exc:
            return _error(exc.status, exc.field, exc.message)
        except DataError as exc:  # unknown ids found deeper down
            return _error(404, _field(str(exc)), str(exc))
        except ConfigError as exc:  # malformed filters, k, source names
            return _error(400, _field(str(exc)), str(exc))

    return run


async def _body(request: Request, *, allow_empty: bool = False) -> dict[str, Any]:
    declared = request.headers.get("content-length")
    if declared is not None:
        if not declared.isdigit():
            raise RequestError(400, "body", "body: the Content-Length header is not a number")
        if int(declared) > MAX_BODY:
            raise RequestError(413, "body", f"body: larger than {MAX_BODY} bytes ({declared})")
    chunks, size = [], 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > MAX_BODY:
            raise RequestError(413, "body", f"body: larger than {MAX_BODY} bytes")
        chunks.append(chunk)
    raw = b"".join(chunks)
    if not raw.strip():
        if allow_empty:
            return {}
        raise RequestError(400, "body", "body: empty; send a JSON object")
    try:
        body = json.loads(raw.decode("utf-8"), parse_constant=_no_constant)
    except (UnicodeDecodeError, json.JSONDecodeError, ValueError, RecursionError) as exc:
        raise RequestError(400, "body", f"body: not valid JSON ({str(exc)[:200]})") from None
    if not isinstance(body, dict):
        raise RequestError(400, "body", f"body: must be a JSON object, got {type(body).__name__}")
    return body


def _no_constant(name: str) -> Any:
    raise ValueError(f"{name} is not a JSON number")


def _keys(body: dict[str, Any], allowed: set[str], *, required: set[str]) -> None:
    unknown = sorted(k for k in body if k not in allowed)
    if unknown:
        raise RequestError(400, unknown[0], f"{unknown[0]}: unknown field; allowed: {sorted(allowed)}"[:300])
    missing = sorted(required - set(body))
    if missing:
        raise RequestError(400, missing[0], f"{missing[0]}: missing")


def _id(value: Any, field: str) -> str:
    if isinstance(value, bool) or not isinstance(value, (str, int)):
        raise RequestError(400, field, f"{field}: must be a string (or an integer id), got {type(value).__name__}")
    text = str(value)
    if not text or len(text) > 1000:
        raise RequestError(400, field, f"{field}: must be 1 to 1000 characters long")
    return text


def _k(value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise RequestError(400, "k", f"k: must be an integer, got {type(value).__name__} {str(value)[:50]}")
    if not 1 <= value <= MAX_K:
        raise RequestError(400, "k", f"k: must be between 1 and {MAX_K}, got {value}")
    return value


def _bool(value: Any, field: str) -> bool:
    if not isinstance(value, bool):
        raise RequestError(400, field, f"{field}: must be true or false, got {str(value)[:50]}")
    return value


def _optional_str(value: Any, field: str) -> str | None:
    if value is not None and not isinstance(value, str):
        raise RequestError(400, field, f"{field}: must be a string or null, got {type(value).__name__}")
    return value


def _filters(body: dict[str, Any]) -> dict[str, Any] | None:
    value = body.get("filters")
    if value is not None and not isinstance(value, dict):
        raise RequestError(400, "filters", f"filters: must be an object, got {type(value).__name__}")
    return value


def _field(message: str) -> str:
    head = message.split(":", 1)[0].strip()
    return head if head and " " not in head else ""


def _records(frame: Any) -> list[dict[str, Any]]:
    return [
        {"item": str(item), "score": float(score), "rank": int(rank)}
        for item, score, rank in zip(frame["item"], frame["score"], frame["rank"], strict=True)
    ]


def _json(payload: dict[str, Any], status: int = 200) -> JSONResponse:
    return JSONResponse(_finite(json.loads(json.dumps(payload, default=json_default))), status_code=status)


def _finite(value: Any) -> Any:
    """JSON has no NaN or infinity: such numbers (e.g. an undefined interval in the evidence) become null."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_finite(v) for v in value]
    return value


def _error(status: int, field: str, message: str) -> JSONResponse:
    return JSONResponse({"error": message, "field": field}, status_code=status)


def _now() -> str:
    return _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds")
