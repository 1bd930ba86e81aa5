"""Time the report at scale: ``planning.report_html`` on a run of bench.py's data.

Generates (or reuses) ``bench.py``'s data under ``--work``, computes the run
in process without writing (``geopress.run(..., write=False)``), then renders
report.html ``--repeat`` times and prints the median time and the page's size
in bytes. The report is made in the main process beside the GeoPackage writer,
so its time adds to a run's when the writer is done first.

    python scripts/bench_report.py                 # N = 1,000,000
    python scripts/bench_report.py --n 100000      # a quick check
"""

from __future__ import annotations

import argparse
import statistics
import time
from pathlib import Path

from bench import prepare  # scripts/ is on the path when run as a script


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1_000_000, help="customers (default 1,000,000)")
    ap.add_argument("--repeat", type=int, default=3, help="renderings to take the median of (default 3)")
    ap.add_argument("--work", type=Path, default=Path("bench-out"), help="folder for data and outputs")
    args = ap.parse_args()
    config = prepare(args.work.resolve(), args.n)

    import geopress
    from geopress import planning

    result = geopress.run(config, write=False)
    times = []
    for _ in range(args.repeat):
        t0 = time.perf_counter()
        html = planning.report_html(result.config, result.customers, result.points, result.zone_summary, result.plan, result.info)
        times.append(time.perf_counter() - t0)
    print(f"{len(result.customers):,} customers: report_html median {statistics.median(times):.2f} s "
          f"({', '.join(f'{t:.2f}' for t in times)} s), {len(html.encode('utf-8')):,} bytes")


if __name__ == "__main__":
    main()
