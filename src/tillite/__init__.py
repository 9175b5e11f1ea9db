"""tillite: segment warehouse tables where they live.

SQL aggregates compute clustering features (count, linear sum, square sum) per
grid cell inside the database; Python merges them and segments in memory;
refine passes and labels run back in SQL.
"""

__version__ = "0.1.0"

from .engines import DuckDBEngine, TilliteError, open_source  # noqa: E402
from .model import Model  # noqa: E402
from .pipeline import Settings, label, segment  # noqa: E402
from .sqlgen import Source  # noqa: E402

__all__ = ["DuckDBEngine", "Model", "Settings", "Source", "TilliteError", "label", "open_source", "segment", "__version__"]
