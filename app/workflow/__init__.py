"""Services. Each takes a session inside the caller's transaction and appends its audit event."""


class WorkflowError(Exception):
    """A request the rules refuse. ``status`` is the HTTP status a web caller should answer."""

    status = 400

    def __init__(self, message: str, *, field: str | None = None, status: int | None = None):
        super().__init__(message)
        self.message = message
        self.field = field
        if status is not None:
            self.status = status


class NotFound(WorkflowError):
    status = 404


class Conflict(WorkflowError):
    """An out-of-order step or a lost race (HTTP 409)."""

    status = 409


class Forbidden(WorkflowError):
    status = 403


# The largest id a lookup accepts. Ids are INTEGER columns: 32-bit signed on PostgreSQL, which
# refuses a larger number in a query ("integer out of range"), and 64-bit on SQLite, which counts
# ids up from 1 as well, so no stored row lies outside 1..ID_MAX.
ID_MAX = 2**31 - 1


def in_id_range(value: object) -> bool:
    """Whether ``value`` is an integer that can be a stored row's id (1 to :data:`ID_MAX`)."""
    return isinstance(value, int) and not isinstance(value, bool) and 1 <= value <= ID_MAX

