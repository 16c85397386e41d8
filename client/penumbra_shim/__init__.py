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
    guidance = run.latest_guidance()      # ... and where the finest levels should sit (advisory)
    run.close()

The link never stalls the evolution: ``open_run`` waits at most ``open_timeout_s`` (5 s by
default) and otherwise returns a *pending* handle that opens the run in the background;
``submit`` never waits on the network. Slices dropped while the server is unreachable are
counted with their reason (``run.dropped_by_reason``) and, once the link is back, recorded on
the server as a gap of the run (``run.gaps``; the event ``client_gap_recorded``).

Units: G = c = 1; lengths, times and masses in units of the run's mass scale M. Results are
advisory: the evolution decides what to do with them.
"""

from ._auth import channel_credentials
from ._client import DEFAULT_OPEN_TIMEOUT_S, Client, connect
from ._event_stream import DEFAULT_IDLE_TIMEOUT_S, EventStream
from ._errors import (
    CropError,
    InvalidArgumentError,
    PenumbraError,
    RunNotFoundError,
    ServerError,
    SliceValidationError,
    UnknownWireValueError,
)
from ._excision import EXCISION_MASK_FIELD, ExcisedSphere
from ._link import DROP_REASONS, ClientGap, DroppedRange, DroppedSlice
from ._fields import VARIABLE_SETS, optional_fields, required_fields
from ._slices import DEFAULT_CHUNK_BYTES, OutgoingPatch, OutgoingSlice, PatchData, build_slice, crop_outgoing_slice
from ._events import (
    EVENT_KINDS,
    ClientGapRecordedEvent,
    CommonHorizonFormedEvent,
    FormationForecastEvent,
    DataWindowsEvent,
    Event,
    GuidanceEvent,
    OtherEvent,
    RunStateChangedEvent,
    SliceProcessedEvent,
    SlicePartsMissingEvent,
    SliceRejectedEvent,
    SliceSkippedEvent,
    SurfaceFoundEvent,
    SurfaceNotFoundEvent,
    TrackUpdatedEvent,
    WarningEvent,
)
from ._guidance_types import (
    BodyRefinement,
    CommonHorizon,
    DataWindow,
    DataWindows,
    Guidance,
    PositionForecast,
    RefinedRegion,
    TrackPoint,
    TrackUpdate,
)
from ._results import RunInfo, SliceAck, SurfaceReport, SurfaceState
from ._run_handle import RunHandle
from ._sender import SenderStats, SubmitTicket
from ._spec_types import BacklogOptions, Body, FinderOptions, RefinementOptions, RunSpec

__all__ = [
    "DEFAULT_CHUNK_BYTES",
    "DEFAULT_IDLE_TIMEOUT_S",
    "DEFAULT_OPEN_TIMEOUT_S",
    "DROP_REASONS",
    "ClientGap",
    "DroppedRange",
    "DroppedSlice",
    "EVENT_KINDS",
    "EXCISION_MASK_FIELD",
    "VARIABLE_SETS",
    "BacklogOptions",
    "Body",
    "BodyRefinement",
    "Client",
    "CommonHorizon",
    "CropError",
    "DataWindow",
    "DataWindows",
    "Event",
    "ClientGapRecordedEvent",
    "CommonHorizonFormedEvent",
    "FormationForecastEvent",
    "DataWindowsEvent",
    "GuidanceEvent",
    "OtherEvent",
    "RunStateChangedEvent",
    "SliceProcessedEvent",
    "SlicePartsMissingEvent",
    "SliceRejectedEvent",
    "SliceSkippedEvent",
    "SurfaceFoundEvent",
    "SurfaceNotFoundEvent",
    "TrackUpdatedEvent",
    "WarningEvent",
    "EventStream",
    "ExcisedSphere",
    "FinderOptions",
    "Guidance",
    "InvalidArgumentError",
    "PositionForecast",
    "RefinedRegion",
    "RefinementOptions",
    "OutgoingPatch",
    "OutgoingSlice",
    "PatchData",
    "PenumbraError",
    "RunHandle",
    "RunInfo",
    "RunNotFoundError",
    "RunSpec",
    "SenderStats",
    "ServerError",
    "SliceAck",
    "SliceValidationError",
    "SubmitTicket",
    "SurfaceReport",
    "SurfaceState",
    "TrackPoint",
    "TrackUpdate",
    "UnknownWireValueError",
    "build_slice",
    "channel_credentials",
    "crop_outgoing_slice",
    "connect",
    "optional_fields",
    "required_fields",
]
