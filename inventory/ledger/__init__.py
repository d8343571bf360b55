"""The ledger: every close, its locks and reopenings, kept for good (SQLite per site, or one
PostgreSQL database shared by many sites)."""

from inventory.ledger.pg import PgLedger
from inventory.ledger.store import Ledger

__all__ = ["Ledger", "PgLedger"]
