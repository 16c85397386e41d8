"""Slices in parts benchmark: prints figures, asserts nothing (run: python tests/benchmarks/bench_parts.py).

Measured side by side in one run, on one machine, so read the ratios. The server runs in this
process (its own thread and event loop); every sender is a separate spawned process, as MPI ranks
on other nodes would be. The run's body lies outside the data, so no finder job competes.

1. The same bytes per iteration sent whole by one process, and as one part per rank by
   ``--ranks`` processes at once (each rank sends one slab of the box).
2. The cost of a slice that is almost all empty parts: rank 0 sends one small patch, every other
   rank an empty part (the usual case once the ranks crop to the server's data windows).
3. Event-loop time of the assembly itself (no network): storing parts of many small patches and
   merging them, per part and per patch.
4. What keeping each part on disk before its answer costs (part files, flushed to the disk):
   the same parts received with and without part files, side by side (no network).
   ``--files-only`` runs this section alone.
"""

from __future__ import annotations

import argparse
import asyncio
import multiprocessing
import sys
import tempfile
import time

import numpy as np

import penumbra_shim as ps
from penumbra_server.server import BackgroundServer, ServerOptions

SPEC = ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (100.0, 0, 0), 1.0),), name="bench parts",
                  backlog=ps.BacklogOptions(queue_depth=2))


def slab_patches(nodes: int, ranks: int) -> list[ps.PatchData]:
    """The box [-1, 1]^3 of nodes^3 flat-space nodes cut into ``ranks`` slabs along x (no overlap)."""
    h = 2 / (nodes - 1)
    bounds = np.linspace(0, nodes - 1, ranks + 1).round().astype(int)
    patches = []
    for first, last in zip(bounds[:-1], bounds[1:]):
        shape = (int(last - first + 1), nodes, nodes)
        fields = {name: np.zeros(shape) for name in ps.required_fields("adm")}
        for name in ("gamma_xx", "gamma_yy", "gamma_zz"):
            fields[name] = np.ones(shape)
        patches.append(ps.PatchData(origin=(-1 + first * h, -1, -1), spacing=(h, h, h), fields=fields))
    return patches


def sender(address: str, run_id: str, rank: int, ranks: int, nodes: int, iterations: int, mode: str,
           barrier, results) -> None:
    """One process: sends its share of ``iterations`` slices; reports (rank, seconds, bytes)."""
    patches = slab_patches(nodes, ranks)
    if mode == "whole":
        mine, count = patches, 1
    elif mode == "parts":
        mine, count = [patches[rank]], ranks
    else:  # "sparse": only rank 0 has data, and only a little
        small = slab_patches(9, 1)
        mine, count = (small if rank == 0 else []), ranks
    with ps.connect(address, deadline_s=120) as client:
        run = client.attach_run(run_id, queue_depth=iterations, cache_results=False)
        barrier.wait(300)
        start = time.perf_counter()
        tickets = [run.submit_arrays(time=float(i), iteration=i, patches=mine, part_index=rank if count > 1 else 0,
                                     part_count=count) for i in range(iterations)]
        acks = [t.result(600) for t in tickets]
        elapsed = time.perf_counter() - start
        run.close(close_run=False)
    results.put((rank, elapsed, sum(a.bytes_sent for a in acks), sum(a.accepted for a in acks)))


def run_senders(address: str, *, mode: str, processes: int, ranks: int, nodes: int, iterations: int) -> dict:
    context = multiprocessing.get_context("spawn")
    with ps.connect(address) as client:
        run = client.open_run(SPEC, cache_results=False)
        results, barrier = context.Queue(), context.Barrier(processes)
        workers = [context.Process(target=sender, args=(address, run.run_id, rank, ranks, nodes, iterations, mode,
                                                        barrier, results)) for rank in range(processes)]
        for w in workers:
            w.start()
        reports = [results.get(timeout=900) for _ in workers]
        for w in workers:
            w.join()
        info = client.get_run(run.run_id)
        run.close(close_run=True)
    wall = max(r[1] for r in reports)
    sent = sum(r[2] for r in reports)
    return {"wall_s": wall, "bytes": sent, "MiBps": sent / wall / 2**20, "per_iteration_ms": 1e3 * wall / iterations,
            "slices_received": info.slices_received, "parts_acked": sum(r[3] for r in reports)}


class _Sink:
    """Takes assembled slices and drops them (the assembly alone is measured)."""

    def __init__(self) -> None:
        self.assembled = 0

    def check_accepting(self) -> None:
        pass

    def is_duplicate(self, iteration: int) -> bool:
        return False

    def duplicate_response(self, iteration, received_bytes):
        raise AssertionError("no duplicates are sent")

    def accept_assembled(self, slice_, nbytes, report):
        from penumbra_shim._wire import horizons_pb2 as pb

        self.assembled += 1
        return pb.SendSliceResponse(outcome=pb.SendSliceResponse.OUTCOME_ACCEPTED)


def bench_assembly(*, parts: int, patches_per_part: int) -> dict:
    """Event-loop seconds to store ``parts`` parts and merge them (patches of 4^3 nodes)."""
    from penumbra_server.numerics.slices import Patch, VariableSet
    from penumbra_server.server.parts import PartAssembly, PartLabel, ReceivedPart

    fields = {name: np.zeros((4, 4, 4)) for name in ps.required_fields("adm")}
    received = []
    for index in range(parts):
        patches = tuple(Patch(origin=(index, j, 0.0), spacing=(0.1, 0.1, 0.1), shape=(4, 4, 4), level=0, fields=fields)
                        for j in range(patches_per_part))
        received.append(ReceivedPart(iteration=0, time=0.0, variable_set=VariableSet.ADM,
                                     label=PartLabel(index, parts), patches=patches, nbytes=0))

    async def main() -> tuple[float, int]:
        sink = _Sink()
        assembly = PartAssembly(sink, run_id="bench", deadline_s=600)
        start = time.perf_counter()
        for part in received:
            await assembly.receive(part, max_bytes=1 << 40)
        return time.perf_counter() - start, sink.assembled

    seconds, assembled = asyncio.run(main())
    return {"seconds": seconds, "assembled": assembled, "us_per_part": 1e6 * seconds / parts,
            "us_per_patch": 1e6 * seconds / (parts * patches_per_part)}


def bench_part_files(*, parts: int, nodes: int, root: str) -> dict:
    """Seconds to receive ``parts`` parts of one ``nodes``^3 patch each, with part files (each
    written and flushed before its answer, on a thread as the run's archive thread) and without."""
    from concurrent.futures import ThreadPoolExecutor
    from pathlib import Path

    from penumbra_server.numerics.slices import Patch, VariableSet
    from penumbra_server.server.part_files import PartFiles
    from penumbra_server.server.parts import PartAssembly, PartLabel, ReceivedPart
    from penumbra_server.server.spool import RunSpool

    rng = np.random.default_rng(0)
    fields = {name: rng.standard_normal((nodes,) * 3) for name in ps.required_fields("adm")}
    nbytes = sum(a.nbytes for a in fields.values())
    received = [ReceivedPart(iteration=0, time=0.0, variable_set=VariableSet.ADM, label=PartLabel(i, parts),
                             patches=(Patch(origin=(2.0 * i, 0, 0), spacing=(0.1,) * 3, shape=(nodes,) * 3, level=0,
                                            fields=fields),), nbytes=nbytes) for i in range(parts)]

    async def one(with_files: bool, iteration: int) -> float:
        with ThreadPoolExecutor(max_workers=1) as thread:
            assembly = PartAssembly(_Sink(), run_id="bench", deadline_s=600)
            spool = RunSpool(Path(root) / f"bench-{iteration}.spool")
            if with_files:
                assembly.attach_files(PartFiles(spool.directory), thread, spool.path_for)
            start = time.perf_counter()
            for part in received:
                await assembly.receive(part, max_bytes=1 << 40)
            return time.perf_counter() - start

    async def main() -> tuple[float, float]:
        files_s, memory_s = [], []
        for repeat in range(3):  # alternated: a machine's load drift hits both alike
            files_s.append(await one(True, repeat))
            memory_s.append(await one(False, repeat))
        return min(files_s), min(memory_s)

    files_s, memory_s = asyncio.run(main())
    return {"files_ms_per_part": 1e3 * files_s / parts, "memory_ms_per_part": 1e3 * memory_s / parts,
            "MiB_per_part": nbytes / 2**20, "files_MiBps": parts * nbytes / files_s / 2**20}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--ranks", type=int, default=8)
    parser.add_argument("--nodes", type=int, default=97, help="nodes per side of the box (97: ~87 MiB a slice)")
    parser.add_argument("--iterations", type=int, default=4)
    parser.add_argument("--files-only", action="store_true", help="run section 4 alone")
    args = parser.parse_args(argv)
    if args.files_only:
        return _files_section(args.nodes // 3, args.ranks)
    print(f"python {sys.version.split()[0]}, {args.ranks} ranks, {args.nodes}^3 nodes, {args.iterations} iterations")
    with tempfile.TemporaryDirectory() as root, \
            BackgroundServer("127.0.0.1:0", archive_root=root, workers=1, options=ServerOptions(workers=1)) as bg:
        common = dict(ranks=args.ranks, nodes=args.nodes, iterations=args.iterations)
        whole = run_senders(bg.address, mode="whole", processes=1, **common)
        parts = run_senders(bg.address, mode="parts", processes=args.ranks, **common)
        sparse = run_senders(bg.address, mode="sparse", processes=args.ranks, **common)
    print(f"1. whole, 1 process:        {whole['MiBps']:8.1f} MiB/s, {whole['per_iteration_ms']:8.1f} ms per slice "
          f"({whole['slices_received']} slices received)")
    print(f"   parts, {args.ranks} processes:     {parts['MiBps']:8.1f} MiB/s, {parts['per_iteration_ms']:8.1f} ms per "
          f"slice ({parts['slices_received']} slices received, {parts['parts_acked']} parts acked); "
          f"ratio parts/whole {parts['MiBps'] / whole['MiBps']:.2f}")
    print(f"2. sparse, {args.ranks} processes:    {sparse['per_iteration_ms']:8.1f} ms per slice "
          f"({sparse['bytes']} bytes, {sparse['slices_received']} slices received)")
    for parts_n, per in ((64, 4), (1024, 4), (1024, 32)):
        a = bench_assembly(parts=parts_n, patches_per_part=per)
        print(f"3. assembly of {parts_n} parts x {per} patches: {a['seconds'] * 1e3:7.1f} ms on the loop, "
              f"{a['us_per_part']:6.1f} us per part, {a['us_per_patch']:5.2f} us per patch "
              f"({a['assembled']} slice assembled)")
    return _files_section(args.nodes // 3, args.ranks)


def _files_section(nodes: int, parts: int) -> int:
    with tempfile.TemporaryDirectory() as root:
        f = bench_part_files(parts=parts, nodes=nodes, root=root)
    print(f"4. {parts} parts of {f['MiB_per_part']:.1f} MiB: {f['files_ms_per_part']:7.1f} ms per part kept on disk "
          f"({f['files_MiBps']:.0f} MiB/s), {f['memory_ms_per_part']:7.2f} ms per part in memory only")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
