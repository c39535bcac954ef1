"""Persistence: SQLAlchemy models, engines, migrations. Only this package and the
service layer import SQLAlchemy."""
