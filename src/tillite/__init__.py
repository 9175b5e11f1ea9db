"""tillite: segment warehouse tables where they live.

SQL aggregates compute clustering features (count, linear sum, square sum) per
grid cell inside the database; Python merges them and segments in memory;
refine passes and labels run back in SQL.
"""

__version__ = "0.1.0"

#: The public names and the module each lives in; imported on first use, so
#: `import tillite` (and the command's start-up) stays light.
_PUBLIC = {
    "DuckDBEngine": "engines",
    "TilliteError": "errors",
    "open_source": "engines",
    "Model": "model",
    "Settings": "settings",
    "label": "pipeline",
    "segment": "pipeline",
    "Source": "sqlgen",
}

__all__ = ["DuckDBEngine", "Model", "Settings", "Source", "TilliteError", "label", "open_source", "segment", "__version__"]


def __getattr__(name: str):
    if name in _PUBLIC:
        import importlib

        return getattr(importlib.import_module(f".{_PUBLIC[name]}", __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
