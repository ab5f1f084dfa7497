"""Storage: SQLAlchemy tables, engine and sessions, the audit chain."""
