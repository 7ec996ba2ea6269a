"""Benchmarks, run with ``python -m bench`` (every module here that has a ``main()``), or ``python -m bench NAME``."""
