"""Many runs at once: one server (2 worker processes, tokens checked) serving 20 concurrent runs
of small slices, each from its own client with its own writer token; the latency each run saw.

Run: PYTHONPATH=client:service python tests/benchmarks/bench_campaign.py [--runs 20] [--slices 5]
Prints on stdout (details on stderr):

    runs <n>, slices per run <k>, wall <s> s, <rate> slices/s
    per-run latency s: median <m>, p90 <p>, max <x>
    slowest slice latency s: <s>

A slice's latency is from the server accepting it to its slice_processed commit (the archive's
``latency_s``); a run's latency is the median over its slices; the figures are over the runs
(p90: nearest rank). Every run sends all its slices at once, so latency includes the wait for
the workers, shared among the runs (server/dispatch.py).
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time

import numpy as np

from penumbra_server.archive import open_archive
from penumbra_server.server import BackgroundServer, ServerOptions
from penumbra_server.server.tokens import TokenBook, TokenEntry, token_digest
from penumbra_server.tools.campaign import latency_summary, run_campaign

OPENER = "bench-campaign-opener-token-0123456789abcdef"


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=20)
    parser.add_argument("--slices", type=int, default=5, help="slices per run")
    parser.add_argument("--nodes", type=int, default=21, help="vertices per side of a slice's patch")
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args(argv)
    book = TokenBook((TokenEntry("bench", "opener", token_digest(OPENER)),))
    with tempfile.TemporaryDirectory(prefix="penumbra-bench-campaign-") as root:
        with BackgroundServer(archive_root=root, workers=args.workers, token_book=book,
                              options=ServerOptions(restore_runs=False)) as bg:
            started = time.perf_counter()
            records = run_campaign(bg.address, runs=args.runs, slices=args.slices, nodes=args.nodes,
                                   token=OPENER, timeout_s=3600.0)
            wall = time.perf_counter() - started
        per_run, every = [], []
        for record in records:
            latencies = open_archive(root, record.run_id).slices()["latency_s"]
            every.extend(latencies.tolist())
            per_run.append(float(np.median(latencies)))
            print(f"run {record.index:2d} {record.run_id}: {len(latencies)} slices, latency median "
                  f"{np.median(latencies):.2f} s, max {np.max(latencies):.2f} s", file=sys.stderr)
    summary = latency_summary(per_run)
    total = args.runs * args.slices
    print(f"runs {args.runs}, slices per run {args.slices}, wall {wall:.1f} s, {total / wall:.3f} slices/s")
    print(f"per-run latency s: median {summary['median']:.2f}, p90 {summary['p90']:.2f}, max {summary['max']:.2f}")
    print(f"slowest slice latency s: {max(every):.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
