"""Rendered pages remembered between requests, keyed by everything they show.

A page is a function of the stored records and of who asks. Every change to the stored records
goes through a service that appends an audit event in the same transaction, and every event
advances the chain head; so the chain head (sequence number and hash), the viewer (id, name,
roles, form token) and the address identify one rendering. Pages that show a live integrity
check (the fit page's snapshot hash and signature validity) add a digest of the rows they check,
so a change made behind the services' back shows on the next request whether the page was
cached or not.

Not cached: a request with flashed messages waiting (they are shown once), and anything that
raises (a 404 stays a 404). The cache is per process, bounded in bytes
(``PAGE_CACHE_MB``, 0 turns it off; ``app.caches``), least recently used first out. Each entry
keeps the page gzip-compressed as well, made once, for browsers that accept it (all do): the
fit page's 86 KB go out as about a sixth of that.
"""

from __future__ import annotations

import gzip
from collections.abc import Callable
from typing import NamedTuple

from flask import Response, current_app, g, request, session

from app.caches import ByteCache
from app.web.access import csrf_token
from app.web.freshness import chain_position
from app.workflow.digests import rows_digest  # noqa: F401  (pages' live digests)


class Page(NamedTuple):
    """A rendered page as sent: UTF-8 bytes, and the same gzip-compressed (made once)."""

    body: bytes
    gzipped: bytes


class PageCache(ByteCache):
    """Rendered pages, bounded in bytes by their length (both forms)."""

    def __init__(self, max_bytes: int):
        super().__init__(max_bytes, sizeof=lambda page: len(page.body) + len(page.gzipped))


# Quick compression: most of a page is repeated markup, and it is compressed once per entry.
GZIP_LEVEL = 6


def _response(page: Page) -> Response:
    """The page in the form the browser accepts (gzip when it says so, as browsers do)."""
    if request.accept_encodings["gzip"]:
        response = Response(page.gzipped, mimetype="text/html")
        response.headers["Content-Encoding"] = "gzip"
    else:
        response = Response(page.body, mimetype="text/html")
    response.vary.add("Accept-Encoding")
    return response


def _cache() -> PageCache | None:
    app = current_app._get_current_object()
    cache = app.extensions.get("plumbline.page_cache")
    if cache is None:
        megabytes = float(app.config.get("PAGE_CACHE_MB", 64))
        if megabytes <= 0:
            return None
        cache = app.extensions.setdefault("plumbline.page_cache",
                                          PageCache(int(megabytes * 1024 * 1024)))
    return cache


def render(page: tuple, build: Callable[[], str], live: str = "") -> Response | str:
    """The page ``build()`` renders, reused while nothing it shows can have changed (kept
    encoded, as it is sent).

    ``page`` names the page (e.g. ``("study", 3)``); ``live`` is a digest of rows a live check
    reads, for pages that show one.
    """
    cache = _cache()
    if cache is None or session.get("_flashes"):
        return build()
    user = g.user
    token = csrf_token()  # made before the key, so every page of a session carries the same one
    key = (page, request.full_path, chain_position(), live,
           None if user is None else (user.id, user.full_name, user.roles,
                                      user.must_change_password),
           token)
    found = cache.get(key)
    if found is None:
        body = build().encode()
        found = Page(body, gzip.compress(body, compresslevel=GZIP_LEVEL, mtime=0))
        cache.put(key, found)
    return _response(found)
