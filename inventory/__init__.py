"""Month-end stockpile inventory close from laser scans and weighed movements."""

__version__ = "0.1.0"
