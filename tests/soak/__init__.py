"""Fault-injection soak with real processes (``python -m tests.soak``, ``make soak``; docs/soak.md). No test_ files: pytest does not collect it."""
