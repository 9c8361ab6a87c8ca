"""Write src/rowcast/data/logistic_cdf.npy: the exact integer logistic CDF on the family grid.

Run after changing any constant in src/rowcast/family.py (which also bumps the archive
format version). Takes a few seconds; the result is identical on every machine.
"""

from pathlib import Path

import numpy as np

from rowcast.tables import build_logistic_cdf

if __name__ == "__main__":
    out = Path(__file__).resolve().parents[1] / "src" / "rowcast" / "data" / "logistic_cdf.npy"
    table = build_logistic_cdf()
    np.save(out, table)
    print(f"wrote {out} {table.shape} {table.dtype}")
