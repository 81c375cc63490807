"""Streaming statistical process monitoring for factory lines.

The statistics live in :mod:`monitor.spc` (pure, no I/O); everything that talks
to files, brokers or databases lives beside it in the ``monitor`` package.
"""

__all__: list[str] = []
