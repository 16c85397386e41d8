"""`penumbra watch`: a refreshing terminal view of one run, from any machine that reaches the server.

The frame is a pure function of what the server reports (:func:`render_frame`): the run's
counters (``GetRun``), the latest state of every surface (``GetLatestSurfaces``) and the
progress of the run read from its event stream (newest slice processed, recent skips). The
loop redraws it with plain ANSI codes on a terminal and prints frames one after another (no
escape codes) when the output is not a terminal, so it also works in logs and over ``ssh -T``.

Below the table: when the common horizon formed (the server's ``common_horizon_formed`` event,
once per run), the newest formation forecast before it (``formation_forecast``: the smallest
enclosing constant expansion c_min and when it is expected to reach zero), the remnant (the
common surface's latest masses and spin with error bars and how far they still move over the
last 10 M, :mod:`penumbra_server.tracking.remnant`, from the found events the view has read)
and the latest refinement guidance (``GetLatestGuidance``): per body, or for the
remnant after merger, the centre, radius and spacing of its recommended finest region. The
guidance is advisory; the frame says so.

"Lag" has two parts, both shown: how far the latest found surface trails the evolution, i.e.
the newest slice the server has received (coordinate time, M; the newest slice processed when
the server does not report what it received), and the wall-clock latency from a slice's arrival
to its result being archived (s). Slices still queued at the server are counted in the header.

The frame is drawn by watch_frame.py, the event stream read by watch_progress.py; here the loop
that follows a run and redraws.
"""

from __future__ import annotations

import sys
import threading
import time
from typing import TextIO

from penumbra_server.cli.safe_text import terminal_safe_lines
# The frame's and the progress's names stay importable from here.
from penumbra_server.cli.watch_frame import (  # noqa: F401
    COLUMNS,
    GUIDANCE_COLUMNS,
    formation_line,
    guidance_rows,
    render_frame,
    surface_rows,
)
from penumbra_server.cli.watch_progress import REMNANT_ROWS, RunProgress, find_common_formed, read_progress  # noqa: F401

__all__ = ["RunProgress", "render_frame", "formation_line", "surface_rows", "guidance_rows", "read_progress", "find_common_formed",
           "watch_run"]

_CLEAR = "\x1b[H\x1b[2J"


def _latest_guidance(client, run_id: str):
    import penumbra_shim as ps

    try:
        return client.latest_guidance(run_id)
    except ps.RunNotFoundError:
        raise
    except ps.PenumbraError:  # an older server without GetLatestGuidance: show the rest
        return None


def watch_run(client, run_id: str, *, once: bool = False, interval_s: float = 1.0, stream: TextIO | None = None,
              server: str = "", max_frames: int | None = None) -> int:
    """Draw frames for ``run_id`` until the run is closed (or once). Returns an exit status.

    Raises the shim's ``RunNotFoundError`` / ``PenumbraError`` for an unknown run or an
    unreachable server (the command line turns them into a message).
    """
    import penumbra_shim as ps

    stream = stream or sys.stdout
    tty = bool(getattr(stream, "isatty", lambda: False)())
    info = client.get_run(run_id)
    progress = read_progress(client, run_id, int(info.last_seq))
    states = client.latest_surfaces(run_id)
    body_labels = {getattr(b, "label", "") for b in (getattr(info.spec, "bodies", ()) or ())}
    if progress.common_formed is None and any(l not in body_labels and getattr(s, "latest_found", None) is not None
                                              for l, s in states.items()):
        progress.common_formed = find_common_formed(client, run_id, progress.last_seq)
    if once:
        stream.write(render_frame(info, states, progress, guidance=_latest_guidance(client, run_id), server=server))
        stream.flush()
        return 0

    events = client.watch(run_id, from_seq=progress.last_seq + 1, idle_timeout_s=None)  # quiet runs too

    def follow() -> None:
        try:
            for event in events:
                progress.absorb(event)
        except Exception:  # the frame loop's unary calls report connection problems
            return

    follower = threading.Thread(target=follow, name="penumbra-watch-events", daemon=True)
    follower.start()
    frames = 0
    unreachable_since = None
    try:
        while True:
            try:
                info = client.get_run(run_id)
                frame = render_frame(info, client.latest_surfaces(run_id), progress,
                                     guidance=_latest_guidance(client, run_id), server=server)
                unreachable_since = None
            except ps.RunNotFoundError:
                raise
            except ps.PenumbraError as err:  # keep watching through a server restart; the stream resumes itself
                unreachable_since = unreachable_since or time.time()
                frame = (f"penumbra watch  {run_id}  {server}\nserver unreachable for "
                         f"{time.time() - unreachable_since:.0f} s ({err}); retrying every {interval_s:g} s\n")
                info = None
            frame = terminal_safe_lines(frame)
            stream.write((_CLEAR + frame) if tty else (frame + "\n"))
            stream.flush()
            frames += 1
            if (info is not None and info.state == "closed") or (max_frames is not None and frames >= max_frames):
                return 0
            time.sleep(interval_s)
    except KeyboardInterrupt:
        return 130
    finally:
        events.cancel()
        follower.join(timeout=2.0)
