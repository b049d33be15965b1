"""loopledger: a design-requirements ledger for feedback-control loops."""
__version__ = "0.1.0"
