"""The ledger: every close, its locks and reopenings, kept for good."""

from inventory.ledger.store import Ledger

__all__ = ["Ledger"]
