"""Book stock from weighed movements, scale metrology, and the reconciliation of book with survey."""

from inventory.stock.book import BookResult, book_stock
from inventory.stock.reconcile import Reconciliation

__all__ = ["BookResult", "Reconciliation", "book_stock"]
