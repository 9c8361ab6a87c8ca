"""rowcast: lossless compression of small camera images with a learned, integer-exact predictor."""

from rowcast.api import compress, decode_entries, decompress, read_index, verify
from rowcast.errors import DataError, RowcastError, UsageError

__all__ = ["compress", "decompress", "verify", "read_index", "decode_entries",
           "RowcastError", "DataError", "UsageError"]
__version__ = "0.8.0"
