"""Storage: schema (models), engine and sessions (session), migrations, and the query
modules (keys, readings; alerts and thresholds). SQL lives here and nowhere else."""

from service.db.models import Base
from service.db.session import Database, make_engine

__all__ = ["Base", "Database", "make_engine"]
