"""Project a run's time for larger programs from one measured benchmark (run by hand).

Reads ``<work>/bench-<N>.json`` and the ledger of that benchmark's run
(``<work>/out-<lake>/ledger``: ``shard_work`` gives each episode shard's own seconds) and
prints the formula's terms and a table for the program sizes asked for:

    T(P, W) = (t_ingest + t_learn + t_evaluate + t_episodes_serial) * P / N
              + ceil(P / S / W) * t_shard

where N is the measured number of homes, S the shard size, W the Dask workers (each the
size of the measuring machine), t_shard the mean measured seconds of one shard, and
t_episodes_serial the episode stage's wall time minus the sum of its shards (planning,
publishing the shards, the episode summary, starting the process). Everything but the
shards runs on one machine and is taken as linear in the number of homes, which the
measurements at 1,000 and 10,000 homes can check (``--against``).

    PYTHONPATH=. python bench/projection.py --work bench_out --premises 10000 --workers 8 32
"""

from __future__ import annotations

import argparse
import json
import math
from pathlib import Path

import polars as pl


def measured(work: Path, premises: int) -> dict[str, float]:
    report = json.loads((work / f"bench-{premises}.json").read_text())
    lake = Path(report["lake"]).name
    ledger = work / f"out-{lake}" / "ledger"
    shards = pl.read_parquet(ledger / "shard_work" / "run_date=*" / "*.parquet", hive_partitioning=False)
    first_run = shards.sort("run_id")["run_id"][0]
    shards = shards.filter((pl.col("run_id") == first_run) & (pl.col("status") == "computed"))
    stage = {s["stage"]: s["seconds"] for s in report["stages"]}
    return {
        "premises": premises,
        "shard_premises": float(shards["n_premises"].max()),
        "shards": float(shards.height),
        "t_shard": float(shards["seconds"].mean()),
        "t_episodes_serial": stage["episodes"] - float(shards["seconds"].sum()),
        "t_ingest": stage["ingest"],
        "t_learn": stage["learn"],
        "t_evaluate": stage["evaluate"],
        "whole": report["whole_run"]["seconds"],
        "floor": report["floor"]["seconds"],
    }


def projected(m: dict[str, float], premises: int, workers: int) -> dict[str, float]:
    scale = premises / m["premises"]
    serial = (m["t_ingest"] + m["t_learn"] + m["t_evaluate"] + m["t_episodes_serial"]) * scale
    shards = math.ceil(premises / m["shard_premises"] / workers) * m["t_shard"]
    return {"serial": serial, "shards": shards, "total": serial + shards}


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--work", type=Path, default=Path("bench_out"))
    parser.add_argument("--premises", type=int, default=10000, help="the measured benchmark's homes")
    parser.add_argument("--workers", type=int, nargs="+", default=[8, 32])
    parser.add_argument("--sizes", type=int, nargs="+", default=[100_000, 1_000_000])
    args = parser.parse_args()
    m = measured(args.work, args.premises)
    print(json.dumps({k: round(v, 3) for k, v in m.items()}, indent=2))
    print("| homes | Dask workers | one-machine part, s | shards, s | total, h |")
    print("|---|---|---|---|---|")
    for size in args.sizes:
        for workers in args.workers:
            p = projected(m, size, workers)
            hours = p["total"] / 3600
            print(f"| {size:,} | {workers} | {p['serial']:,.0f} | {p['shards']:,.0f} | {hours:.2f} |")


if __name__ == "__main__":
    main()
