"""Throughput of ``rollscan process``: local engine vs Dask with 1 and 2 local workers.

The same as ``rollscan bench --stored`` (see ``rollscan.bench.scaleout``):

    python benchmarks/stored_dask.py --steps 50_000_000
"""

import sys

from rollscan.bench.scaleout import main

if __name__ == "__main__":
    sys.exit(main())
