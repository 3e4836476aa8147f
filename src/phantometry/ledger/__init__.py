"""Trend ledger: analyses and measurements across sessions (SQLAlchemy; SQLite or PostgreSQL)."""
