#!/usr/bin/env python3
"""Audit many rollout files in parallel on Dask's distributed scheduler, then merge.

Each file is one shard: a Dask worker runs `gradaudit shard FILE --out FILE.shard` (the Poisson
audit of that file's episodes), and when every shard is written one `gradaudit merge` turns
them into the report of all episodes, the same report `gradaudit audit --resampling poisson`
gives on one concatenated log (the shards' replicate weights are keyed by episode id).

    python3 scripts/dask_shards.py --gradaudit target/release/gradaudit \\
        --shards-dir shards/ --out report.json --format json \\
        --shard-args "--resamples 2000 --gamma 0.99" logs/part-*.csv.gz

A LocalCluster runs here; for a real cluster pass --scheduler tcp://HOST:8786 (every worker
must see the files and the binary at the same paths). Timing goes to stderr.
"""

import argparse
import os
import shlex
import subprocess
import sys
import time


def shard_one(gradaudit, log, out, shard_args):
    """Runs on a worker: one `gradaudit shard`; returns the shard path, raises on failure."""
    cmd = [gradaudit, "shard", log, "--out", out, "--quiet", *shard_args]
    done = subprocess.run(cmd, capture_output=True, text=True)
    if done.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed ({done.returncode}): {done.stderr.strip()}")
    return out


def main():
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("logs", nargs="+", help="rollout files, one shard each")
    p.add_argument("--gradaudit", default="gradaudit", help="the gradaudit binary")
    p.add_argument("--shards-dir", required=True, help="folder for the shard files")
    p.add_argument("--out", default="-", help="the merged report (default stdout)")
    p.add_argument("--format", default="table", help="report format (as `gradaudit merge`)")
    p.add_argument("--shard-args", default="", help="options for every `gradaudit shard`")
    p.add_argument("--workers", type=int, default=2, help="LocalCluster workers")
    p.add_argument("--scheduler", help="address of an existing Dask scheduler instead")
    a = p.parse_args()

    from dask.distributed import Client, LocalCluster

    start = time.perf_counter()
    os.makedirs(a.shards_dir, exist_ok=True)
    gradaudit = os.path.abspath(a.gradaudit) if os.sep in a.gradaudit else a.gradaudit
    shard_args = shlex.split(a.shard_args)
    outs = [
        os.path.join(a.shards_dir, f"{i:05d}-{os.path.basename(log)}.shard")
        for i, log in enumerate(a.logs)
    ]
    if a.scheduler:
        client, cluster = Client(a.scheduler), None
    else:
        # Threads are enough: the work happens in the gradaudit processes they start.
        cluster = LocalCluster(
            n_workers=a.workers, threads_per_worker=1, processes=False, dashboard_address=None
        )
        client = Client(cluster)
    try:
        ready = time.perf_counter()
        futures = client.map(
            shard_one,
            [gradaudit] * len(a.logs),
            [os.path.abspath(x) for x in a.logs],
            [os.path.abspath(x) for x in outs],
            [shard_args] * len(a.logs),
            pure=False,
        )
        shards = client.gather(futures)
        sharded = time.perf_counter()
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    merge = [gradaudit, "merge", *shards, "--format", a.format, "--out", a.out]
    done = subprocess.run(merge)
    end = time.perf_counter()
    print(
        f"dask_shards: {len(shards)} shards on {a.workers if not a.scheduler else 'remote'} "
        f"workers: cluster {ready - start:.2f} s, shards {sharded - ready:.2f} s, "
        f"merge {end - sharded:.2f} s, total {end - start:.2f} s",
        file=sys.stderr,
    )
    return done.returncode


if __name__ == "__main__":
    sys.exit(main())
