"""Shared helpers of the service tests: Brill-Lindquist slices as shim patches, raw wire streams."""

from __future__ import annotations

import asyncio
import time

import numpy as np

import penumbra_shim as ps
from penumbra_server.numerics.spacetimes import BrillLindquist, sample_patch

#: A lone puncture slightly off the grid's symmetry centre (no node sits on it).
LONE_CENTRE = (0.013, -0.021, 0.017)


def box(centre, half_width: float, nodes: int, level: int = 0) -> dict:
    """A cube of ``nodes``^3 vertices centred on ``centre``."""
    centre = np.asarray(centre, dtype=float)
    h = 2 * half_width / (nodes - 1)
    return {"origin": tuple(centre - half_width), "spacing": (h, h, h), "shape": (nodes,) * 3, "level": level}


def patch_data(spacetime, spec: dict, *, variable_set: str = "adm", memory_order: str = "C",
               with_gauge: bool = False) -> ps.PatchData:
    """Sample ``spacetime`` on the box ``spec`` and hand it over as shim PatchData."""
    patch = sample_patch(spacetime, origin=spec["origin"], spacing=spec["spacing"], shape=spec["shape"],
                         level=spec.get("level", 0), variable_set=variable_set, memory_order=memory_order)
    keep = set(ps.required_fields(variable_set)) | (set(ps.optional_fields(variable_set)) if with_gauge else set())
    fields = {name: arr for name, arr in patch.fields.items() if name in keep}
    return ps.PatchData(origin=spec["origin"], spacing=spec["spacing"], fields=fields, level=spec.get("level", 0))


def lone_hole(mass: float = 1.0, centre=LONE_CENTRE) -> BrillLindquist:
    return BrillLindquist(masses=(mass,), positions=(centre,))


def lone_hole_slice(iteration: int, *, mass: float = 1.0, nodes: int = 33, variable_set: str = "adm",
                    memory_order: str = "C") -> ps.OutgoingSlice:
    """A single puncture of mass ``mass`` on one patch of half-width 1.2 mass."""
    spec = box(LONE_CENTRE, 1.2 * mass, nodes)
    return ps.build_slice(time=0.1 * iteration, iteration=iteration, variable_set=variable_set,
                          patches=[patch_data(lone_hole(mass), spec, variable_set=variable_set,
                                              memory_order=memory_order)])


def lone_spec(name: str = "lone hole", *, lmax: int = 6, queue_depth: int = 4, mass: float = 1.0) -> ps.RunSpec:
    return ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", LONE_CENTRE, mass),), name=name,
                      finder=ps.FinderOptions(lmax=lmax, tolerance=1e-8),
                      backlog=ps.BacklogOptions(queue_depth=queue_depth))


def raw_requests(outgoing: ps.OutgoingSlice, run_id: str, *, chunk_bytes: int = 1 << 20):
    """The wire messages the shim would send, as a list (tests then tamper with them)."""
    return list(outgoing.requests(run_id, chunk_bytes=chunk_bytes))


def wait_until(condition, what: str, timeout_s: float) -> None:
    """Poll ``condition()`` until it is true; fail naming ``what`` after ``timeout_s`` (a deadline
    for a hang, not a timing assertion)."""
    deadline = time.monotonic() + timeout_s
    while not condition():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout_s} s waiting for {what}")
        time.sleep(0.02)


async def within_turns(condition, what, turns: int = 1000) -> None:
    """Let the event loop turn until ``condition()`` holds; fail after ``turns`` turns naming
    ``what()`` (turns, not seconds: the machine's speed does not enter)."""
    for _ in range(turns):
        if condition():
            return
        await asyncio.sleep(0)
    raise AssertionError(f"not reached within {turns} event-loop turns: {what()}")
