"""The functional core stays pure: no I/O libraries, a stated public API."""

from __future__ import annotations

import subprocess
import sys

import monitor.spc

SHELL_LIBRARIES = (
    "asyncio",
    "aiomqtt",
    "paho",
    "sqlalchemy",
    "structlog",
    "pydantic",
    "ruamel",
    "pyarrow",
    "orjson",
)


def test_the_core_imports_no_shell_library():
    """Importing monitor.spc loads none of the libraries that belong to the shell."""
    code = (
        "import sys, monitor.spc\n"
        f"bad = [m for m in sys.modules if m.split('.')[0] in {SHELL_LIBRARIES!r}]\n"
        "print(','.join(sorted(bad)))\n"
    )
    result = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=60
    )
    assert result.stdout.strip() == ""


def test_every_exported_name_exists_and_is_listed_once():
    """monitor.spc.__all__ names real objects, each once, and nothing public is left out."""
    exported = monitor.spc.__all__
    assert len(exported) == len(set(exported))
    for name in exported:
        assert hasattr(monitor.spc, name), name
    public = {n for n in vars(monitor.spc) if not n.startswith("_")}
    submodules = {
        "arl",
        "charts",
        "chartset",
        "constants",
        "errors",
        "exact_scale",
        "laws",
        "limits",
        "parents",
        "pvalues",
        "rules",
        "signals",
        "subgroups",
        "types",
    }
    assert public - set(exported) - submodules == set()


def test_constants_object_has_exactly_the_trade_names():
    """constants(n) exposes d2, d3, c4, A2, A3, B3, B4, D3, D4 and E2 under those names."""
    k = monitor.spc.constants(4)
    for name in ("d2", "d3", "c4", "A2", "A3", "B3", "B4", "D3", "D4", "E2"):
        assert isinstance(getattr(k, name), float)
