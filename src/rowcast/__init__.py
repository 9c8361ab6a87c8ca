"""rowcast: lossless compression of small camera images with a learned, integer-exact predictor.

The user actions (`compress`, `decompress`, `verify`, `read_index`, `decode_entries`) are
imported on first use, so importing a submodule does not load the model runtime.
"""

from rowcast.errors import DataError, RowcastError, UsageError

__all__ = ["compress", "decompress", "verify", "read_index", "decode_entries",
           "RowcastError", "DataError", "UsageError"]
__version__ = "0.14.0"

_ACTIONS = ("compress", "decompress", "verify", "read_index", "decode_entries")


def __getattr__(name: str):
    """The user actions of `rowcast.api`, loaded when first asked for."""
    if name in _ACTIONS:
        from rowcast import api

        return getattr(api, name)
    raise AttributeError(f"module 'rowcast' has no attribute {name!r}")
