"""structlog set-up: JSON lines when stdout is not a terminal, readable lines when it is.

Library logs (paho, SQLAlchemy, alembic) go through the same renderer. Events are named
``noun_verb`` in the past tense and carry their data as keyword arguments; per-chart events
are bound to ``chart``.
"""

from __future__ import annotations

import logging
import sys
from typing import TextIO

import structlog

__all__ = ["configure_logging", "get_logger"]


def configure_logging(*, level: str = "info", stream: TextIO | None = None, json: bool | None = None) -> None:
    """Configure structlog and the standard library logging once, for the daemon and the CLI.

    Args:
        level: lowest level shown (debug, info, warning, error).
        stream: where to write (standard output by default).
        json: force JSON (True) or console (False); None decides by whether ``stream`` is a terminal.
    """
    out = stream or sys.stdout
    as_json = (not out.isatty()) if json is None else json
    shared: list[structlog.types.Processor] = [
        structlog.contextvars.merge_contextvars,
        structlog.stdlib.add_log_level,
        structlog.processors.TimeStamper(fmt="iso", utc=True),
    ]
    renderer: structlog.types.Processor = (
        structlog.processors.JSONRenderer() if as_json else structlog.dev.ConsoleRenderer(colors=out.isatty())
    )
    numeric = logging.getLevelNamesMapping().get(level.upper(), logging.INFO)
    structlog.configure(
        processors=[
            *shared,
            structlog.processors.StackInfoRenderer(),
            structlog.processors.dict_tracebacks if as_json else structlog.processors.format_exc_info,
            renderer,
        ],
        wrapper_class=structlog.make_filtering_bound_logger(numeric),
        logger_factory=structlog.PrintLoggerFactory(file=out),
        cache_logger_on_first_use=False,
    )
    handler = logging.StreamHandler(out)
    handler.setFormatter(
        structlog.stdlib.ProcessorFormatter(
            foreign_pre_chain=shared,
            processors=[structlog.stdlib.ProcessorFormatter.remove_processors_meta, renderer],
        )
    )
    root = logging.getLogger()
    root.handlers[:] = [handler]
    root.setLevel(max(numeric, logging.WARNING))


def get_logger(**bound: object) -> structlog.typing.FilteringBoundLogger:
    """A logger with ``bound`` context (for example ``chart=...``)."""
    logger: structlog.typing.FilteringBoundLogger = structlog.get_logger(**bound)
    return logger
