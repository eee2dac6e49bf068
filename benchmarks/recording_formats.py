"""Size and read speed of the two recording formats for the benchmark hour (issue 11).

Usage: python benchmarks/recording_formats.py [--keep DIR] [--repeats 3]

Takes the hour of line Q2 that ``replay_throughput.py`` / ``replay_floor.py`` simulate (``q2-60min.csv.gz`` in
``--keep``, made if missing), writes its Parquet copy with ``spanwatch.connectors.recording.write_recording`` (what
``simulate --out X.parquet`` writes), and reads each with ``read_recording`` (every row judged and counted, as a
replay reads it) and, as the reference, with pyarrow alone (no judging). Best of ``--repeats`` runs, each in this
one process, one thread; CPU time and wall time. Figures are printed; nothing is asserted.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

import pyarrow as pa  # noqa: E402
import pyarrow.csv as pacsv  # noqa: E402
import pyarrow.parquet as pq  # noqa: E402
from spanwatch.connectors.recording import read_recording, write_recording  # noqa: E402
from spanwatch.monitor.line import load_line  # noqa: E402

CONFIG = ROOT / "config" / "quillmere-q2.toml"


def best(fn, repeats: int) -> tuple[float, float, int]:
    """(best CPU s, best wall s, rows) of ``repeats`` calls of ``fn`` (which returns the rows it read)."""
    cpu = wall = float("inf")
    rows = 0
    for _ in range(repeats):
        c0, w0 = time.process_time(), time.perf_counter()
        rows = fn()
        cpu, wall = min(cpu, time.process_time() - c0), min(wall, time.perf_counter() - w0)
    return cpu, wall, rows


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--keep", type=Path, default=Path("/tmp/bench"))
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    args.keep.mkdir(parents=True, exist_ok=True)
    csv = args.keep / "q2-60min.csv.gz"
    if not csv.exists():
        from benchmarks.replay_throughput import make_recording

        make_recording(csv, 60.0)
    names = tuple(load_line(CONFIG).tags)
    parquet = args.keep / "q2-60min.parquet"
    t0 = time.perf_counter()
    write_recording(parquet, read_recording(csv, names))
    write_s = time.perf_counter() - t0

    def ours(path: Path, fast: bool = True):
        return lambda: sum(len(b) for b in read_recording(path, names, fast=fast))

    def arrow_csv() -> int:
        opts = pacsv.ReadOptions(use_threads=False)
        with pa.CompressedInputStream(pa.OSFile(str(csv)), "gzip") as f:
            return pacsv.read_csv(f, read_options=opts).num_rows

    def arrow_parquet() -> int:
        return pq.read_table(parquet, use_threads=False).num_rows

    print(f"load average {' '.join(f'{x:.2f}' for x in os.getloadavg())}; best of {args.repeats}")
    print(f"{'format':<34}{'size MB':>9}{'CPU s':>8}{'wall s':>8}{'rows':>11}")
    for label, path, fn in (("CSV gzip, spanwatch reader", csv, ours(csv)),
                            ("CSV gzip, line by line (fast=False)", csv, ours(csv, fast=False)),
                            ("CSV gzip, pyarrow alone", csv, arrow_csv),
                            ("Parquet, spanwatch reader", parquet, ours(parquet)),
                            ("Parquet, pyarrow alone", parquet, arrow_parquet)):
        cpu, wall, rows = best(fn, args.repeats)
        print(f"{label:<34}{path.stat().st_size / 1e6:>9.1f}{cpu:>8.2f}{wall:>8.2f}{rows:>11,}")
    meta = pq.ParquetFile(parquet).metadata
    print(f"Parquet copy written in {write_s:.2f} s (read from the CSV included): {meta.num_row_groups} row groups "
          f"of {meta.row_group(0).num_rows:,} rows, zstd")


if __name__ == "__main__":
    main()
