"""Archive writer alone: seconds per commit of demo-shaped commits with the write-behind journal
(folded every 64 commits and at close) against folding every commit (the zarr arrays written
per commit, as before the journal), measured side by side in one run.

Run: python tests/benchmarks/bench_archive_journal.py [--commits N] [--rounds R]
Prints exactly this line on stdout (details on stderr):

    archive seconds per commit, journal / fold every commit: <ratio>

A commit is shaped like the demo's per-slice commit (penumbra_server.cli.demo_evolution at
lmax 10: a slice row, rows of the two bodies' surfaces and, from the second commit on, of two
common surfaces at lmax 16, two track points and a forecast per body, four events, a guidance
update with two bodies and seven regions, a window); values are random of the layout's shapes.
Both writers start from a new archive and end with close(); the time of every commit,
add_surface and the close is summed (creation excluded, as in bench_service.py).
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time

import numpy as np

from penumbra_server.archive import ArchiveWriter, FoldPolicy
from penumbra_server.archive import _layout as layout

LMAX, LMAX_COMMON = 10, 16


def _row(columns, rng) -> dict:
    row = {}
    for column in columns:
        shape = tuple(size for _, size in column.trailing)
        if column.dtype == "str":
            row[column.name] = "x" * int(rng.integers(1, 200))
        elif column.dtype == "bool":
            row[column.name] = bool(rng.integers(0, 2))
        elif np.dtype(column.dtype).kind == "i":
            row[column.name] = rng.integers(0, 100, size=shape) if shape else int(rng.integers(0, 100))
        else:
            row[column.name] = rng.standard_normal(shape) if shape else float(rng.standard_normal())
    return row


def _commit_rows(index: int, rng) -> dict:
    surfaces = {label: [_row(layout.surface_columns(LMAX), rng)] for label in ("heavy", "light")}
    if index:
        for label in ("common", "common_inner"):
            surfaces[label] = [_row(layout.surface_columns(LMAX_COMMON), rng)]
    groups = {}
    for label in ("heavy", "light"):
        groups[f"tracks/{label}"] = [_row(layout.TRACK_COLUMNS, rng) for _ in range(2)]
        groups[f"forecasts/{label}"] = [_row(layout.FORECAST_COLUMNS, rng)]
    groups["events"] = [_row(layout.EVENT_COLUMNS, rng) for _ in range(4)]
    groups["guidance/updates"] = [_row(layout.GUIDANCE_UPDATE_COLUMNS, rng)]
    groups["guidance/bodies"] = [_row(layout.GUIDANCE_BODY_COLUMNS, rng) for _ in range(2)]
    groups["guidance/regions"] = [_row(layout.GUIDANCE_REGION_COLUMNS, rng) for _ in range(7)]
    groups["windows"] = [_row(layout.WINDOW_COLUMNS, rng)]
    return {"slice_rows": [_row(layout.SLICE_COLUMNS, rng)], "surface_rows": surfaces, "group_rows": groups,
            "attrs": {"next_event_seq": 20 * index}}


def run_writer(root: str, commits: list[dict], policy: FoldPolicy) -> float:
    writer = ArchiveWriter.create(root, "run-bench", name="bench", run_spec={}, surface_labels=("heavy", "light"),
                                  lmax=LMAX, software_version="bench", fold_policy=policy)
    started = time.perf_counter()
    for index, commit in enumerate(commits):
        if index == 1:
            writer.add_surface("common", lmax=LMAX_COMMON)
            writer.add_surface("common_inner", lmax=LMAX_COMMON)
        writer.commit(**commit)
    writer.close()
    return time.perf_counter() - started


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--commits", type=int, default=40, help="commits per archive (default 40)")
    parser.add_argument("--rounds", type=int, default=2, help="archives per writer kind, interleaved (default 2)")
    args = parser.parse_args(argv)
    rng = np.random.default_rng(20261202)
    commits = [_commit_rows(index, rng) for index in range(args.commits)]
    seconds = {"journal": 0.0, "fold every commit": 0.0}
    policies = {"journal": FoldPolicy(commits=64), "fold every commit": FoldPolicy(commits=1)}
    for round_ in range(args.rounds):
        for name, policy in policies.items():
            with tempfile.TemporaryDirectory(prefix="penumbra-bench-journal-") as tmp:
                took = run_writer(tmp, commits, policy)
            seconds[name] += took
            print(f"{name} (round {round_ + 1}): {took:.2f} s, {1e3 * took / args.commits:.1f} ms per commit",
                  file=sys.stderr)
    print(f"archive seconds per commit, journal / fold every commit: "
          f"{seconds['journal'] / seconds['fold every commit']:.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
