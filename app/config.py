"""Default settings. Override in instance/config.py or with PLUMBLINE_<NAME> variables."""

from __future__ import annotations

DEFAULTS: dict[str, object] = {
    # SQLite file in the instance folder unless PLUMBLINE_DATABASE_URL names another database.
    "DATABASE_URL": None,
    "SECRET_KEY": None,
    "SOFTWARE_VERSION": None,
    # OWASP ASVS 5 (V11.4) floor for argon2id is 19 MiB and 2 iterations; we default above it
    # (RFC 9106's second recommended option, 64 MiB, t=3).
    "ARGON2_MEMORY_KIB": 65536,
    "ARGON2_TIME_COST": 3,
    "ARGON2_PARALLELISM": 1,
    # Consecutive wrong passwords (at signing and at a password change, one counter) that lock
    # both for SIGN_LOCK_MINUTES or until an admin unlocks the account.
    "SIGN_LOCK_FAILURES": 5,
    "SIGN_LOCK_MINUTES": 15,
    # Key of the HMAC-SHA-256 that stands in the audit trail for a sign-in name matching no
    # account (a password typed there by mistake is never kept); unset, SECRET_KEY is used.
    "LOGIN_NAME_KEY": None,
    # The integrity key: HMAC-SHA-256 seals on every audit event, snapshot, signature and
    # confirmation result, and on each chain head in instance/audit-anchor.log (app.store.keys);
    # unset, a key is generated once into instance/integrity_key.
    "INTEGRITY_KEY": None,
    # Keys taken out of service, comma-separated, so that older seals still check (besides
    # instance/integrity_keys.retired, which `plumbline audit rotate-key` appends to).
    "INTEGRITY_RETIRED_KEYS": None,
    # Days a new API token lives unless its maker asks for fewer (or more, up to the maximum).
    "API_TOKEN_DAYS": 90,
    "API_TOKEN_MAX_DAYS": 365,
    "SESSION_IDLE_MINUTES": 30,
    "SESSION_MAX_HOURS": 12,
    "MAX_UPLOAD_BYTES": 20_000_000,
    "MAX_UPLOAD_CELLS": 2_000_000,
    "SESSION_COOKIE_NAME": "plumbline",
    "SESSION_COOKIE_HTTPONLY": True,
    "SESSION_COOKIE_SAMESITE": "Lax",
    "SESSION_COOKIE_SECURE": False,
    "BEHIND_PROXY": False,
    "SQLITE_BUSY_TIMEOUT_MS": 15000,
    # Rendered study and fit pages kept per process (app.web.pagecache); 0 turns it off.
    "PAGE_CACHE_MB": 64,
}
