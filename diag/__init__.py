"""diag: fault-finding in discrete transistor circuits."""

__version__ = "0.1.0"
