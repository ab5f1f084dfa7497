"""Password hashing (argon2id) and the password policy.

Policy after OWASP ASVS 5 (V6.2): at least 8 characters (15 recommended), at least 64 allowed,
no composition rules, refused when on a list of common passwords.
"""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path

from argon2 import PasswordHasher, Type
from argon2.exceptions import InvalidHashError, VerificationError

MIN_LENGTH = 8
RECOMMENDED_LENGTH = 15
MAX_LENGTH = 128

_settings = {"memory_cost": 65536, "time_cost": 3, "parallelism": 1}


def configure(memory_kib: int, time_cost: int, parallelism: int = 1) -> None:
    # ASVS 5 floor for argon2id: 19 MiB, 2 iterations, 1 degree of parallelism.
    if memory_kib < 19456 or time_cost < 2:
        raise ValueError("argon2id settings below the OWASP ASVS minimum (19 MiB, t=2)")
    _settings.update(memory_cost=memory_kib, time_cost=time_cost, parallelism=parallelism)
    _hasher.cache_clear()


@lru_cache(maxsize=1)
def _hasher() -> PasswordHasher:
    return PasswordHasher(type=Type.ID, **_settings)


def hash_password(password: str) -> str:
    return _hasher().hash(password)


def verify_password(password_hash: str, password: str) -> bool:
    try:
        return _hasher().verify(password_hash, password)
    except (VerificationError, InvalidHashError):
        return False


# A hash of a random string, verified against when the account does not exist, so that a
# failed login costs the same time either way.
@lru_cache(maxsize=1)
def dummy_hash() -> str:
    return _hasher().hash("not-a-real-account-password")


@lru_cache(maxsize=1)
def common_passwords() -> frozenset[str]:
    """Refused passwords, lower-cased, loaded once on first use: the 30,000 most common
    passwords in the frequency list the zxcvbn package ships (ASVS 5 V6.2.4 asks for at least
    the 3,000 most common), and this service's own words (``data/common_passwords.txt``)."""
    from zxcvbn.frequency_lists import FREQUENCY_LISTS  # a large module: import it on first use

    path = Path(__file__).resolve().parent.parent / "data" / "common_passwords.txt"
    own = (line.strip() for line in path.read_text(encoding="utf-8").splitlines()
           if not line.startswith("#"))
    return frozenset(word.lower() for word in (*FREQUENCY_LISTS["passwords"], *own) if word)


def password_problem(password: str, *, username: str | None = None) -> str | None:
    """The reason a new password is refused, or None when it is acceptable."""
    if len(password) < MIN_LENGTH:
        return (f"Password must have at least {MIN_LENGTH} characters "
                f"({RECOMMENDED_LENGTH} or more recommended).")
    if len(password) > MAX_LENGTH:
        return f"Password must have at most {MAX_LENGTH} characters."
    lowered = password.lower()
    if lowered in common_passwords():
        return "That password is on a list of commonly used passwords; choose another."
    if username and lowered == username.lower():
        return "Password must not be the same as the user name."
    return None
