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
