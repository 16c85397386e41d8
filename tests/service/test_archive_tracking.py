"""The tracking groups of a run archive: tracks, forecasts, guidance, windows and tracking events
written by the writer, read back by the reader functions (strings included) and by xarray; the
new surface columns; archives written before those columns existed keep working."""

from __future__ import annotations

import shutil

import numpy as np
import pytest

from penumbra_server.archive import ArchiveError, ArchiveWriter, open_archive


def _writer(tmp_path, run_id="run-track000001"):
    return ArchiveWriter.create(tmp_path, run_id, name="tracking", run_spec={"x": 1}, surface_labels=("A",), lmax=2,
                                software_version="test")


def test_tracking_groups_round_trip_and_open_in_xarray(tmp_path):
    w = _writer(tmp_path)
    w.commit(group_rows={
        "tracks/A": [{"iteration": 0, "time": 0.0, "position": (1, 2, 3), "source": 1, "uncertainty": 0.0,
                      "order": 0, "event_seq": 5},
                     {"iteration": 0, "time": 0.0, "position": (1, 2, 3.1), "source": 2, "uncertainty": 0.0,
                      "order": 0, "event_seq": 5}],
        "forecasts/A": [{"iteration": 0, "time": 0.0, "model": 1, "fit_from": 0.0, "fit_until": 0.0,
                         "lead_time": np.linspace(0, 4, 9), "position": np.ones((9, 3)),
                         "uncertainty": np.full(9, np.inf), "reason": "a single point", "event_seq": 5}],
        "guidance/updates": [{"iteration": 0, "time": 0.0, "valid_from": 0.0, "valid_until": 4.0, "post_merger": False,
                              "nesting_depth": 6, "finest_spacing": 0.01, "reasons": '{"valid": "yes"}', "event_seq": 6}],
        "guidance/regions": [{"iteration": 0, "time": 0.0, "level": 6, "spacing": 0.01, "bodies": "A",
                              "centre": (1, 2, 3), "radius": 0.9, "lower": (0, 1, 2), "upper": (2, 3, 4),
                              "reason": "body A's own level-6 region", "event_seq": 6}],
        "windows": [{"iteration": 0, "time": 0.0, "valid_from": 0.0, "valid_until": 4.0, "name": "A",
                     "lower": (0, 1, 2), "upper": (2, 3, 4), "growth": 0, "extra_nodes": 6, "reason": "ä window",
                     "event_seq": 7}],
        "events": [{"seq": 5, "kind": "track_updated", "iteration": 0, "time": 0.0, "label": "A", "message": "m",
                    "wire": "AAEC", "archived_unix_s": 1.0}],
    })
    view = open_archive(tmp_path, "run-track000001")
    assert view.track_labels == ("A",) and view.forecast_labels == ("A",)
    np.testing.assert_array_equal(view.track("A", source="puncture")["position"], [[1, 2, 3.1]])
    forecasts = view.forecasts("A")
    assert forecasts["position"].shape == (1, 9, 3) and np.isinf(forecasts["uncertainty"]).all()
    assert forecasts["reason"].tolist() == ["a single point"]
    guidance = view.guidance()
    assert guidance["updates"]["reasons"][0] == '{"valid": "yes"}'
    assert guidance["bodies"]["label"].shape == (0,)  # not written yet: empty columns
    (region,) = view.guidance_regions_at(6)
    assert region["bodies"] == "A" and region["radius"] == 0.9
    assert view.windows()["reason"].tolist() == ["ä window"]
    assert view.tracking_events()["kind"].tolist() == ["track_updated"]
    pytest.importorskip("xarray")
    ds = view.group_dataset("windows")
    assert ds["lower"].dims == ("window", "xyz") and ds["name"].values.tolist() == ["A"]
    ds = view.group_dataset("forecasts/A")
    assert ds["position"].dims == ("forecast", "lead", "xyz")
    with pytest.raises(ArchiveError, match="not a tracking group"):
        w.commit(group_rows={"nonsense/A": [{"x": 1}]})


def test_new_surface_columns_are_written_and_old_archives_gain_them(tmp_path):
    w = _writer(tmp_path, "run-track000002")
    row = {"iteration": 0, "time": 0.0, "status": 0, "found": True, "reason": 0, "angular_momentum": (0, 0, 0.6),
           "christodoulou_mass": 1.0, "residual_max_between_nodes": 1e-9, "seed_centre": (1, 1, 1),
           "seed_uncertainty": 0.1, "seed_model": 3}
    w.commit(surface_rows={"A": [row]}, fold=True)  # the row in the zarr arrays
    path = w.path
    # An archive written before these columns existed: remove them from disk.
    for name in ("angular_momentum", "christodoulou_mass", "seed_centre"):
        shutil.rmtree(path / "surfaces" / "A" / name)
    again = ArchiveWriter.open_existing(path)
    again.commit(surface_rows={"A": [dict(row, iteration=1, time=1.0)]})
    cols = open_archive(path).surface("A")
    assert cols["iteration"].tolist() == [0, 1]
    np.testing.assert_array_equal(cols["angular_momentum"][1], (0, 0, 0.6))
    assert np.isnan(cols["angular_momentum"][0]).all()  # fill for the row written before
    assert np.isnan(cols["christodoulou_mass"][0]) and cols["christodoulou_mass"][1] == 1.0
    assert cols["seed_model"].tolist() == [3, 3] and cols["residual_max_between_nodes"][0] == 1e-9
