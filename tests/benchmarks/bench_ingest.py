"""Ingest benchmark: prints figures, asserts nothing (run: python tests/benchmarks/bench_ingest.py).

Measured side by side in one run, on one machine, so read the ratios. The servers run in this
process (threads with their own event loops); every client runs in a separate spawned process,
as an evolution code on another node would (sharing one interpreter's GIL halved the figures).

1. Ingest throughput, shim + Penumbra server (SendSlice: header, 1 MiB chunks, assembly,
   finiteness check, queueing) against a raw gRPC client stream of the same bytes in 1 MiB
   messages to a bare grpc.aio handler that only counts them (the transport's ceiling).
   The run's body lies outside the data, so no finder job competes for the two cores.
2. How long submit() blocks the caller (it only queues; build_slice makes the copy).
3. Latency from a slice's arrival at the server to its surface events (Brill-Lindquist lone
   hole, slices sent slowly enough that none waits in the queue).
4. The spool's cost: writing one slice of the throughput size to a run's spool (file written,
   fsync, rename, directory fsync: what SendSlice does before its answer) and removing it,
   against the upload time per slice measured in 1. (which already includes the spool write).
"""

from __future__ import annotations

import argparse
import asyncio
import multiprocessing
import statistics
import sys
import tempfile
import threading
import time
from pathlib import Path

import grpc
import numpy as np

import penumbra_shim as ps
from penumbra_server.archive import open_archive
from penumbra_server.numerics.slices import Patch, Slice, VariableSet
from penumbra_server.numerics.spacetimes import BrillLindquist, sample_patch
from penumbra_server.server import BackgroundServer, ServerOptions
from penumbra_server.server.run_types import QueuedSlice
from penumbra_server.server.spool import RunSpool

_RAW_METHOD = "/penumbra.bench.RawBytes/Send"


class RawBytesServer:
    """A bare grpc.aio server whose one client-streaming method counts the bytes it receives."""

    def __init__(self) -> None:
        self.port = 0
        self._ready = threading.Event()
        self._loop: asyncio.AbstractEventLoop | None = None
        self._stop: asyncio.Event | None = None
        self._thread = threading.Thread(target=lambda: asyncio.run(self._main()), daemon=True)

    async def _main(self) -> None:
        async def send(request_iterator, context):
            total = 0
            async for message in request_iterator:
                total += len(message)
            return total.to_bytes(8, "little")

        handler = grpc.method_handlers_generic_handler(
            "penumbra.bench.RawBytes", {"Send": grpc.stream_unary_rpc_method_handler(send)})
        server = grpc.aio.server(options=[("grpc.so_reuseport", 0), ("grpc.max_receive_message_length", 64 << 20)])
        server.add_generic_rpc_handlers((handler,))
        self.port = server.add_insecure_port("127.0.0.1:0")
        await server.start()
        self._loop = asyncio.get_running_loop()
        self._stop = asyncio.Event()
        self._ready.set()
        await self._stop.wait()
        await server.stop(0.5)

    def __enter__(self) -> "RawBytesServer":
        self._thread.start()
        self._ready.wait(30)
        return self

    def __exit__(self, *exc) -> None:
        self._loop.call_soon_threadsafe(self._stop.set)
        self._thread.join(10)


def flat_fields(nodes: int) -> dict[str, np.ndarray]:
    fields = {name: np.zeros((nodes,) * 3) for name in ps.required_fields("adm")}
    for name in ("gamma_xx", "gamma_yy", "gamma_zz"):
        fields[name] = np.ones((nodes,) * 3)
    return fields


def bench_throughput(address: str, *, nodes: int, slices: int) -> dict:
    fields = flat_fields(nodes)
    patch = ps.PatchData(origin=(-1, -1, -1), spacing=(2 / (nodes - 1),) * 3, fields=fields)
    nbytes = sum(a.nbytes for a in fields.values())
    with ps.connect(address, deadline_s=60) as client:
        # The body is far outside the data: the server assembles and queues, and no job runs.
        spec = ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (100.0, 0, 0), 1.0),), name="bench ingest",
                          backlog=ps.BacklogOptions(queue_depth=2))
        run = client.open_run(spec, queue_depth=slices, cache_results=False)
        build_s, submit_s, tickets = [], [], []
        start = time.perf_counter()
        for i in range(slices):
            t0 = time.perf_counter()
            outgoing = ps.build_slice(time=float(i), iteration=i, variable_set="adm", patches=[patch])
            t1 = time.perf_counter()
            tickets.append(run.submit(outgoing))
            submit_s.append(time.perf_counter() - t1)
            build_s.append(t1 - t0)
        run.flush(600)
        elapsed = time.perf_counter() - start
        acks = [t.result(0) for t in tickets]
        sent = sum(a.bytes_sent for a in acks if a.accepted)
        send_seconds = run.stats.send_seconds
        run.close()
    return {
        "slice_bytes": nbytes,
        "accepted": sum(a.accepted for a in acks),
        "wall_MiBps": sent / elapsed / 2**20,
        "stream_MiBps": sent / send_seconds / 2**20,
        "build_s": build_s,
        "submit_s": submit_s,
    }


def bench_raw(port: int, *, nbytes: int, slices: int, chunk: int = 1 << 20) -> float:
    payload = bytes(nbytes)
    with grpc.insecure_channel(f"127.0.0.1:{port}", options=[("grpc.max_send_message_length", 64 << 20)]) as channel:
        send = channel.stream_unary(_RAW_METHOD)
        send(iter([b"warm-up"]), timeout=30)
        start = time.perf_counter()
        for _ in range(slices):
            reply = send((payload[o:o + chunk] for o in range(0, nbytes, chunk)), timeout=120)
            assert int.from_bytes(reply, "little") == nbytes
        elapsed = time.perf_counter() - start
    return nbytes * slices / elapsed / 2**20


def bench_latency(address: str, archive_root: Path, *, nodes: int, slices: int, interval_s: float) -> dict:
    centre = (0.013, -0.021, 0.017)
    hole = BrillLindquist(masses=(1.0,), positions=(centre,))
    h = 2.4 / (nodes - 1)
    patch = sample_patch(hole, origin=tuple(np.asarray(centre) - 1.2), spacing=(h,) * 3, shape=(nodes,) * 3,
                         variable_set="conformal_w")
    fields = {n: a for n, a in patch.fields.items() if n in ps.required_fields("conformal_w")}
    data = ps.PatchData(origin=tuple(patch.origin), spacing=tuple(patch.spacing), fields=fields)
    with ps.connect(address, deadline_s=60) as client:
        spec = ps.RunSpec(variable_set="conformal_w", bodies=(ps.Body("A", centre, 1.0),), name="bench latency",
                          finder=ps.FinderOptions(lmax=8))
        run = client.open_run(spec, cache_results=False)
        stream = client.watch(run.run_id, timeout_s=600)
        seen: dict[int, float] = {}
        events: list[ps.Event] = []

        def read():
            for event in stream:
                events.append(event)
                if event.kind == "surface_found":
                    seen[event.iteration] = time.perf_counter()

        reader = threading.Thread(target=read, daemon=True)
        reader.start()
        submitted = {}
        for i in range(slices):
            outgoing = ps.build_slice(time=float(i), iteration=i, variable_set="conformal_w", patches=[data])
            submitted[i] = time.perf_counter()
            run.submit(outgoing)
            time.sleep(interval_s)
        run.close()
        reader.join(60)
    view = open_archive(archive_root, run.run_id)
    rows = view.surface("A")
    slices_rows = view.slices()
    arrival = dict(zip(slices_rows["iteration"].tolist(), slices_rows["arrival_unix_s"].tolist()))
    found = [e for e in events if e.kind == "surface_found"]
    return {
        "found": len(found),
        "arrival_to_event_s": [e.emitted_unix_s - arrival[e.iteration] for e in found],
        "arrival_to_archived_s": rows["latency_s"].tolist(),
        "finder_wall_s": rows["wall_time_s"].tolist(),
        "submit_to_event_s": [seen[i] - submitted[i] for i in sorted(seen)],
    }


def bench_spool(directory: Path, *, nodes: int, slices: int) -> dict:
    """Seconds per slice to write a throughput-sized slice to a spool durably, and to remove it."""
    patch = Patch(origin=np.full(3, -1.0), spacing=np.full(3, 2 / (nodes - 1)), shape=(nodes,) * 3, level=0,
                  fields=flat_fields(nodes))
    spool = RunSpool(directory / "bench.spool")
    write_s, release_s = [], []
    for i in range(slices):
        item = QueuedSlice(slice_=Slice(time=float(i), iteration=i, variable_set=VariableSet.ADM, patches=(patch,)),
                           nbytes=0, arrival_unix_s=time.time())
        t0 = time.perf_counter()
        spool.write(item)
        t1 = time.perf_counter()
        spool.release([i])
        release_s.append(time.perf_counter() - t1)
        write_s.append(t1 - t0)
    spool.remove_all()
    return {"write_s": write_s, "release_s": release_s}


def _summary(values) -> str:
    values = list(values)
    if not values:
        return "(no samples)"
    return f"median {statistics.median(values) * 1e3:8.2f} ms   max {max(values) * 1e3:8.2f} ms   (n={len(values)})"


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nodes", type=int, default=64, help="nodes per axis of the throughput slices")
    parser.add_argument("--slices", type=int, default=16, help="slices in the throughput runs")
    parser.add_argument("--latency-nodes", type=int, default=41)
    parser.add_argument("--latency-slices", type=int, default=6)
    options = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as scratch:
        archive_root = Path(scratch)
        with BackgroundServer(archive_root=archive_root, workers=2, options=ServerOptions(workers=2)) as bg, \
                RawBytesServer() as raw, multiprocessing.get_context("spawn").Pool(1) as clients:
            shim = clients.apply(bench_throughput, (bg.address,), dict(nodes=options.nodes, slices=options.slices))
            raw_MiBps = clients.apply(bench_raw, (raw.port,), dict(nbytes=shim["slice_bytes"], slices=options.slices))
            latency = clients.apply(bench_latency, (bg.address, archive_root),
                                    dict(nodes=options.latency_nodes, slices=options.latency_slices, interval_s=1.5))
        spool = bench_spool(archive_root, nodes=options.nodes, slices=options.slices)
    mib = shim["slice_bytes"] / 2**20
    print(f"ingest: {options.slices} slices of {mib:.1f} MiB ({options.nodes}^3 nodes x 12 fields, float64), 1 MiB chunks")
    print(f"  raw grpc.aio bytes stream          {raw_MiBps:8.1f} MiB/s")
    print(f"  shim + server, while streaming     {shim['stream_MiBps']:8.1f} MiB/s   ratio to raw {shim['stream_MiBps'] / raw_MiBps:.2f}")
    print(f"  shim + server, first submit->last ack {shim['wall_MiBps']:5.1f} MiB/s   ratio to raw {shim['wall_MiBps'] / raw_MiBps:.2f}"
          f"   (includes build_slice on the caller thread)")
    print(f"  accepted {shim['accepted']} of {options.slices}")
    print(f"submit() blocking the caller:        {_summary(shim['submit_s'])}")
    print(f"build_slice() (validation + copy):   {_summary(shim['build_s'])}")
    upload_s = shim["slice_bytes"] / (shim["stream_MiBps"] * 2**20)
    write_median = statistics.median(spool["write_s"])
    print(f"spool, one {mib:.1f} MiB slice written durably (fsync, rename) before the answer:")
    print(f"  spool write                        {_summary(spool['write_s'])}   {mib / write_median:8.1f} MiB/s")
    print(f"  spool removal after the archive    {_summary(spool['release_s'])}")
    print(f"  upload per slice (1., spool included) {upload_s * 1e3:8.2f} ms   spool write / upload "
          f"{write_median / upload_s:.2f}")
    print(f"latency, lone hole {options.latency_nodes}^3 conformal_w, lmax 8, {latency['found']} surfaces "
          f"(first slice scans, later ones are seeded):")
    print(f"  arrival -> surface event emitted   {_summary(latency['arrival_to_event_s'])}")
    print(f"  arrival -> row archived            {_summary(latency['arrival_to_archived_s'])}")
    print(f"  finder + measures in the worker    {_summary(latency['finder_wall_s'])}")
    print(f"  submit() -> event at the watcher   {_summary(latency['submit_to_event_s'])}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
