"""`penumbra watch` shows the newest formation forecast (a pure frame from synthetic events)."""

import math

import penumbra_shim as ps
from penumbra_server.cli.watch import RunProgress, formation_line, render_frame


def _event(seq, t, *, c=0.05, found=True, available=True, when=9.7, err=0.4):
    return ps.FormationForecastEvent(seq=seq, run_id="run-cccccccccccc", kind="formation_forecast", time=t,
                                     iteration=int(t), emitted_unix_s=0.0, label="common", c_min_found=found,
                                     c_min=c if found else math.nan, c_min_error=2e-4 if found else math.nan,
                                     forecast_available=available, formation_time=when if available else math.nan,
                                     formation_time_uncertainty=err if available else math.nan,
                                     based_on=4 if available else 1, message="the family ends early")


def test_the_frame_shows_the_newest_forecast():
    spec = ps.RunSpec(variable_set="conformal_w", bodies=(ps.Body("A", (1, 0, 0), 0.5), ps.Body("B", (-1, 0, 0), 0.5)))
    info = ps.RunInfo(run_id="run-cccccccccccc", name="synthetic", state="open", spec=spec, created_unix_s=0.0,
                      closed_unix_s=math.nan, slices_received=9, slices_processed=9, slices_skipped=0,
                      slices_duplicate=0, last_seq=90, archive_path="", last_received_iteration=8,
                      last_received_time=8.0)
    progress = RunProgress(last_seq=90)
    assert formation_line(progress) is None
    assert "formation forecast" not in render_frame(info, {}, progress, now_unix_s=0.0)
    progress.absorb(_event(80, 7.0, c=0.068, when=9.84, err=1.8))
    progress.absorb(_event(85, 5.0, c=0.106))  # an older slice's search, announced later: not shown
    frame = render_frame(info, {}, progress, now_unix_s=0.0)
    assert ("formation forecast (from t = 7.000 M): c_min = 0.06800 +-2.0e-04 /M; common horizon expected at "
            "t = 9.840 +-1.8e+00 M (from 4 slices)") in frame
    assert "common horizon: not formed yet" in frame
    progress.absorb(_event(88, 9.0, found=False, available=False))
    assert formation_line(progress) == ("formation forecast (from t = 9.000 M): c_min not found in that slice "
                                        "(the family ends early); no formation time yet")
