# SPDX-License-Identifier: BSD-3-Clause
"""`make bench`: speed and memory benchmarks (not built yet).

Planned measurements (written to build/bench.json): wall time of a full reduce over
the time to read and write its bytes, peak memory on two night sizes, scaling with
dask.distributed workers, incremental rerun time, and kernel throughputs.
"""

import sys


def main() -> int:
    print("twinfield bench: the benchmark suite is not built yet; nothing was measured.")
    return 0


if __name__ == "__main__":
    sys.exit(main())
