"""A campaign: many runs of small slices sent at once to one server, each from its own client
with its own writer token, and the latency each run saw.

Used by the campaign test (isolation of concurrent runs) and tests/benchmarks/bench_campaign.py
(per-run latency). Each run is a lone Brill-Lindquist puncture of mass 1 at its own position,
sampled on one small patch; run k sends iterations ``k * ITERATION_STRIDE + j`` (j = 0, 1, ...),
so a row or event of one run showing up in another would be seen at once.

Latency of a slice: seconds from the server accepting it to its slice_processed commit (the
``latency_s`` column of the archive's slice rows); a run's latency is the median of its slices'.
"""

from __future__ import annotations

import statistics
import threading
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np

import penumbra_shim as ps

from ..numerics.spacetimes import BrillLindquist, sample_patch

__all__ = ["ITERATION_STRIDE", "CampaignRun", "campaign_slice", "campaign_spec", "run_campaign", "latency_summary"]

#: Iterations of run k start at k times this.
ITERATION_STRIDE = 1000
#: Half-width of a campaign slice's patch, units of M (the horizon of mass 1 has radius 0.5).
_HALF_WIDTH = 1.2


def _centre(index: int) -> tuple[float, float, float]:
    # Off the grid's symmetry centre (no node on the puncture), different for every run.
    return (0.013 + 0.01 * index, -0.021, 0.017)


def campaign_spec(index: int, *, lmax: int = 4) -> ps.RunSpec:
    """The spec of run ``index``: one body "A" of mass 1."""
    return ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", _centre(index), 1.0),), name=f"campaign run {index}",
                      finder=ps.FinderOptions(lmax=lmax, tolerance=1e-8))


def campaign_slice(index: int, step: int, *, nodes: int = 21) -> ps.OutgoingSlice:
    """Slice ``step`` of run ``index``: its puncture on a cube of ``nodes``^3 vertices, t = 0.1 step M."""
    centre = np.asarray(_centre(index))
    h = 2 * _HALF_WIDTH / (nodes - 1)
    origin = tuple(centre - _HALF_WIDTH)
    patch = sample_patch(BrillLindquist(masses=(1.0,), positions=(tuple(centre),)), origin=origin,
                         spacing=(h, h, h), shape=(nodes,) * 3, variable_set="adm")
    keep = set(ps.required_fields("adm"))
    fields = {name: arr for name, arr in patch.fields.items() if name in keep}
    return ps.build_slice(time=0.1 * step, iteration=index * ITERATION_STRIDE + step, variable_set="adm",
                          patches=[ps.PatchData(origin=origin, spacing=(h, h, h), fields=fields)])


@dataclass
class CampaignRun:
    """What one run of the campaign did: its id, writer token, acknowledgements and events."""

    index: int
    run_id: str = ""
    writer_token: str = ""
    accepted: list[int] = field(default_factory=list)
    events: list = field(default_factory=list)
    error: str = ""


def _one_run(address: str, token: str | None, index: int, slices: int, nodes: int, lmax: int,
             opened: threading.Barrier, timeout_s: float) -> CampaignRun:
    record = CampaignRun(index)
    outgoing = [campaign_slice(index, step, nodes=nodes) for step in range(slices)]
    with ps.connect(address, token=token, deadline_s=60.0) as client:
        run = client.open_run(campaign_spec(index, lmax=lmax), queue_depth=slices, cache_results=False,
                              open_timeout_s=timeout_s)
        record.run_id, record.writer_token = run.run_id, run.writer_token
        opened.wait(timeout_s)  # every run open before any sends: they all compete from the start
        tickets = [run.submit(s) for s in outgoing]
        record.accepted = [t.result(timeout_s).iteration for t in tickets if t.result(timeout_s).accepted]
        run.close(timeout_s=timeout_s)
        record.events = list(client.watch(run.run_id, timeout_s=timeout_s))
    return record


def run_campaign(address: str, *, runs: int = 20, slices: int = 3, nodes: int = 21, lmax: int = 4,
                 token: str | None = None, timeout_s: float = 600.0) -> list[CampaignRun]:
    """Open ``runs`` runs at once on the server at ``address`` (each from its own client, with
    the opener ``token`` if the server checks tokens), send each ``slices`` slices, close them,
    and return what each saw, in run order. Raises what any run raised."""
    opened = threading.Barrier(runs)
    with ThreadPoolExecutor(max_workers=runs, thread_name_prefix="campaign") as pool:
        futures = [pool.submit(_one_run, address, token, k, slices, nodes, lmax, opened, timeout_s)
                   for k in range(runs)]
        return [f.result() for f in futures]


def latency_summary(per_run_s: list[float]) -> dict[str, float]:
    """Median, 90th percentile (nearest rank) and maximum of the runs' latencies, seconds."""
    ordered = sorted(per_run_s)
    rank = max(0, int(np.ceil(0.9 * len(ordered))) - 1)
    return {"median": float(statistics.median(ordered)), "p90": float(ordered[rank]), "max": float(ordered[-1])}
