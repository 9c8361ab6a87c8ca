"""The `rowcast` executable: settles the process before numpy loads, then runs the command
line (`cli.main`)."""

import os

# The commands share their work among forked single-threaded processes (`workers`), so
# numpy's BLAS has nothing to gain from threads of its own, and OpenBLAS's threads spin
# after each change of their count, taking a core from the coding processes (measured, 178
# thumbnails of 64 px decompressed on 2 cores: 2.82 -> 2.34 CPU-s, 1.67 -> 1.44 s). OpenBLAS
# reads this once, as numpy loads; a user's own setting wins. Training is not slowed: torch's
# x86 builds run their products on MKL and OpenMP threads (`torch.__config__.show()`).
BLAS_THREADS = {"OPENBLAS_NUM_THREADS": "1"}


def main() -> None:
    """Console entry point (`rowcast`, `python -m rowcast`)."""
    for name, value in BLAS_THREADS.items():
        os.environ.setdefault(name, value)
    from rowcast import cli  # numpy loads here

    cli.main()
