"""Storage: SQLAlchemy models, sessions and queries (SQLite default, PostgreSQL)."""
