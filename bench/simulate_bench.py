"""Wall time and peak memory of simulating the benchmark's lake, and the shape of its meter files.

Not a test. Simulates the lake ``thermal-ledger bench`` would use (``pipeline.bench.prepare_lake``,
so it lands in ``<work>/lake-<N>x<D>-s<S>`` with its ``bench-lake.json`` and the benchmark
reuses it) in a child process, measured from outside: wall seconds, peak resident memory
(``os.wait4``'s ru_maxrss, so native memory counts) and resident memory sampled every half
second (``/proc/<pid>/status``) to show where the peak falls. Then it reads each meter
file's Parquet footer: rows, row groups and the largest row group.

    PYTHONPATH=. python bench/simulate_bench.py --premises 10000 --days 92 --work /work/bench_out
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

import pyarrow.parquet as pq

from pipeline.bench import LAKE_SUMMARY, BenchSettings

_CHILD = """
import sys
from pathlib import Path
from pipeline.bench import BenchSettings, prepare_lake
premises, days, seed, work = int(sys.argv[1]), int(sys.argv[2]), int(sys.argv[3]), Path(sys.argv[4])
prepare_lake(BenchSettings(premises=premises, days=days, seed=seed, work=work, csv=False, reuse=False))
"""


def _rss_mib(pid: int) -> float | None:
    """Resident memory of a live process, MiB (None once it has gone)."""
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    except (FileNotFoundError, ProcessLookupError):
        return None
    return None


def simulate_measured(settings: BenchSettings, every_s: float = 0.5) -> dict:
    """Run ``prepare_lake`` in a child; return wall seconds, peak MiB and the sampled memory."""
    command = [sys.executable, "-c", _CHILD, *map(str, (settings.premises, settings.days, settings.seed))]
    command.append(str(settings.work))
    started = time.perf_counter()
    child = subprocess.Popen(command)
    samples: list[tuple[float, float]] = []
    while True:
        pid, status, usage = os.wait4(child.pid, os.WNOHANG)
        if pid:
            break
        rss = _rss_mib(child.pid)
        if rss is not None:
            samples.append((round(time.perf_counter() - started, 1), round(rss)))
        time.sleep(every_s)
    seconds = time.perf_counter() - started
    code = os.waitstatus_to_exitcode(status)
    if code != 0:
        raise SystemExit(f"the simulation exited with {code}")
    # ru_maxrss is in KiB on Linux.
    return {"seconds": seconds, "peak_mib": usage.ru_maxrss / 1024, "rss_samples_mib": samples}


def meter_files(lake: Path) -> list[dict]:
    """Per meter file: rows, row groups, the largest row group's rows and the file's bytes."""
    out = []
    for path in sorted((lake / "landing" / "meter").glob("*.parquet")):
        meta = pq.ParquetFile(path).metadata
        groups = [meta.row_group(i).num_rows for i in range(meta.num_row_groups)]
        out.append(
            {
                "file": path.name,
                "rows": meta.num_rows,
                "row_groups": meta.num_row_groups,
                "largest_row_group": max(groups),
                "bytes": path.stat().st_size,
            }
        )
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--premises", type=int, required=True)
    parser.add_argument("--days", type=int, default=92)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--work", type=Path, default=Path("bench_out"))
    args = parser.parse_args()
    settings = BenchSettings(args.premises, args.days, args.seed, args.work)
    if (settings.lake / LAKE_SUMMARY).exists():
        raise SystemExit(f"{settings.lake} is already simulated; remove it to measure the simulation again")
    measured = simulate_measured(settings)
    summary = json.loads((settings.lake / LAKE_SUMMARY).read_text())
    files = [f for f in settings.lake.rglob("*") if f.is_file() and f.name != LAKE_SUMMARY]
    meter = meter_files(settings.lake)
    report = {
        "premises": args.premises,
        "days": args.days,
        "seed": args.seed,
        "lake": str(settings.lake),
        "cpus": os.cpu_count(),
        "load_average_after": list(os.getloadavg()),
        **measured,
        "simulator_seconds": summary["seconds"],
        "files": len(files),
        "bytes": sum(f.stat().st_size for f in files),
        "meter_rows": sum(m["rows"] for m in meter),
        "summary_meter_rows": summary["meter_rows"],
        "meter_files": meter,
    }
    path = args.work / f"simulate-{args.premises}x{args.days}-s{args.seed}.json"
    path.write_text(json.dumps(report, indent=2) + "\n")
    print(
        f"{args.premises:,} homes x {args.days} days: {measured['seconds']:.1f} s wall,"
        f" peak {measured['peak_mib']:,.0f} MiB; {report['files']} files, {report['bytes'] / 2**20:,.0f} MiB;"
        f" meter rows {report['meter_rows']:,} in {len(meter)} files"
    )
    for m in meter:
        print(
            f"  {m['file']}: {m['rows']:,} rows in {m['row_groups']} row groups"
            f" (largest {m['largest_row_group']:,}), {m['bytes'] / 2**20:.1f} MiB"
        )
    print(f"figures written to {path}")


if __name__ == "__main__":
    main()
