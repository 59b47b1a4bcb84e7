"""Time pyarrow's CSV reader on one file: the floor that `weighbridge select` is compared
with in examples/bench_select.rs (`--pyarrow PYTHON`). Prints the median wall time in
seconds of `pyarrow.csv.read_csv` over the repeats, with the reader's threads limited to
`--threads` (pyarrow.set_cpu_count). Not a fixture script: its output is a timing.

Needs pyarrow (not in requirements.txt, which pins the fixture scripts' packages):
    python3 -m venv tests/scripts/.venv && tests/scripts/.venv/bin/pip install pyarrow
"""

import argparse
import statistics
import sys
import time


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("path")
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    try:
        import pyarrow
        import pyarrow.csv
    except ImportError as e:
        print(f"pyarrow is not installed: {e}", file=sys.stderr)
        return 2
    pyarrow.set_cpu_count(args.threads)
    pyarrow.set_io_thread_count(args.threads)
    times = []
    rows = 0
    for _ in range(args.repeats):
        start = time.perf_counter()
        table = pyarrow.csv.read_csv(
            args.path, read_options=pyarrow.csv.ReadOptions(use_threads=True)
        )
        times.append(time.perf_counter() - start)
        rows = table.num_rows
        del table
    print(f"{statistics.median(times):.4f}")
    print(f"pyarrow {pyarrow.__version__}: {rows} rows, {args.threads} threads, "
          f"times {', '.join(f'{t:.3f}' for t in times)} s", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
