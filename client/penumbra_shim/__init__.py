"""penumbra_shim: hand 3+1 slices of a numerical-relativity run to a Penumbra server.

Depends on grpcio, protobuf and numpy only. Typical use from an evolution code::

    import penumbra_shim as ps

    client = ps.connect("horizons.example.org:50051")
    run = client.open_run(ps.RunSpec(variable_set="adm",
                                     bodies=[ps.Body("A", (3.0, 0, 0), 0.5), ps.Body("B", (-3.0, 0, 0), 0.5)]))
    ...
    ticket = run.submit(ps.build_slice(time=t, iteration=it, variable_set="adm",
                                       patches=[ps.PatchData(origin=o, spacing=h, fields=arrays)]))
    ...                                   # submit() returned at once; a background thread sends
    states = run.latest_surfaces()        # at the regrid step: latest surface of each body
    run.close()

Units: G = c = 1; lengths, times and masses in units of the run's mass scale M. Results are
advisory: the evolution decides what to do with them.
"""

from ._client import Client, EventStream, RunHandle, SenderStats, SubmitTicket, connect
from ._errors import PenumbraError, RunNotFoundError, SliceValidationError
from ._fields import VARIABLE_SETS, optional_fields, required_fields
from ._slices import DEFAULT_CHUNK_BYTES, OutgoingPatch, OutgoingSlice, PatchData, build_slice
from ._types import (
    EVENT_KINDS,
    BacklogOptions,
    Body,
    Event,
    FinderOptions,
    RunInfo,
    RunSpec,
    SliceAck,
    SurfaceReport,
    SurfaceState,
)

__all__ = [
    "DEFAULT_CHUNK_BYTES",
    "EVENT_KINDS",
    "VARIABLE_SETS",
    "BacklogOptions",
    "Body",
    "Client",
    "Event",
    "EventStream",
    "FinderOptions",
    "OutgoingPatch",
    "OutgoingSlice",
    "PatchData",
    "PenumbraError",
    "RunHandle",
    "RunInfo",
    "RunNotFoundError",
    "RunSpec",
    "SenderStats",
    "SliceAck",
    "SliceValidationError",
    "SubmitTicket",
    "SurfaceReport",
    "SurfaceState",
    "build_slice",
    "connect",
    "optional_fields",
    "required_fields",
]
