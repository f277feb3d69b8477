"""Headless core of diag: numpy, scipy, yaml and the standard library only.

No module under `diag.core` may import textual or rich (tests/test_architecture.py).
"""
