"""Degenerate metrics and absurd spacings in an accepted slice: the finder reports a surface not
found with a message about the data, never "the worker failed" with a LinAlgError."""

from __future__ import annotations

import dataclasses

import pytest

import penumbra_shim as ps

from service_support import LONE_CENTRE, box, lone_hole, lone_spec, patch_data


def _slice(iteration: int, *, metric_scale: float = 1.0, spacing: float | None = None) -> ps.OutgoingSlice:
    """The lone hole's data, its metric scaled, or declared on a grid of another ``spacing`` (M)."""
    patch = patch_data(lone_hole(), box(LONE_CENTRE, 1.2, 33))
    if spacing is not None:
        patch = dataclasses.replace(patch, spacing=(spacing,) * 3)
    for name in ("gamma_xx", "gamma_xy", "gamma_xz", "gamma_yy", "gamma_yz", "gamma_zz"):
        patch.fields[name] = patch.fields[name] * metric_scale
    return ps.build_slice(time=0.1 * iteration, iteration=iteration, variable_set="adm", patches=[patch])


def _outcome(client, run):
    run.close()
    events = list(client.watch(run.run_id, from_seq=1, timeout_s=600))
    return [e for e in events if e.kind in ("surface_found", "surface_not_found")]


@pytest.mark.parametrize("case, make, reason, words", [
    ("all-zero metric", lambda: _slice(1, metric_scale=0.0), "not_converged", "not positive definite"),
    ("negative definite metric", lambda: _slice(1, metric_scale=-1.0), "not_converged", "not positive definite"),
    ("spacing 1e-300", lambda: _slice(1, spacing=1e-300), "outside_data", "no patch"),
    ("spacing 1e300", lambda: _slice(1, spacing=1e300), "outside_data", "no patch"),
])
def test_degenerate_data_is_a_finder_status_not_a_worker_failure(client, case, make, reason, words):
    run = client.open_run(lone_spec(f"degenerate: {case}"), cache_results=False)
    # A good slice first: the degenerate one then starts from the previous surface as well as the scan.
    assert run.submit(_slice(0)).result(60).accepted
    ack = run.submit(make()).result(60)
    assert ack.accepted
    outcomes = _outcome(client, run)
    assert [e.kind for e in outcomes if e.iteration == 0] == ["surface_found"]
    outcomes = [e for e in outcomes if e.iteration == 1]
    assert outcomes, f"{case}: no surface outcome"
    for e in outcomes:
        print(f"{case}: {e.kind} {getattr(e, 'reason', '')}: {e.surface.message if e.surface else ''}")
        assert e.kind == "surface_not_found"
        assert e.reason != "worker_failed", e.surface.message
        assert "LinAlgError" not in e.surface.message
        assert e.reason == reason and words in e.surface.message
