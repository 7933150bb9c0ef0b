"""End-of-day P&L attribution for options books (see README.md)."""

__version__ = "0.1.0"
