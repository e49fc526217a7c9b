"""nightbench: unattended characterisation of RF power detectors (plan -> bench -> SQLite -> report).

The public Python API (`nightbench.open_db`, `nightbench.Results`) lives in nightbench.api and is
loaded on first use, so `import nightbench` stays cheap for the command line.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from nightbench.api import Results, open_db

__all__ = ["Results", "open_db"]


def __getattr__(name: str) -> Any:
    if name in __all__:
        from nightbench import api

        return getattr(api, name)
    raise AttributeError(f"module 'nightbench' has no attribute {name!r}")
