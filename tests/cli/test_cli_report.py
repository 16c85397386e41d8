"""`penumbra report` on a small real archive (zarr on disk, written by the archive writer)."""

import pytest

from penumbra_server.cli.main import main
from penumbra_server.cli.report import load_run, summarise, summary_text, write_report

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def _png_size(path):
    data = path.read_bytes()
    assert data[:8] == PNG_SIGNATURE, f"{path} is not a PNG"
    width = int.from_bytes(data[16:20], "big")
    height = int.from_bytes(data[20:24], "big")
    return width, height


def test_archive_fixture_has_what_the_physics_says(small_archive):
    _, expected = small_archive
    # Both individual horizons exist on every slice of the track.
    assert all(found for _, _, found, _ in expected["heavy"] + expected["light"])
    # A widely separated hole's irreducible mass is close to m_i (1 + m_j / (2 d)) at leading order
    # (references.md item 7); at d = 1.4 M (first slice) within a few per cent.
    t0, _, _, m_heavy = expected["heavy"][0]
    assert m_heavy == pytest.approx(0.6 * (1 + 0.4 / (2 * 1.4)), rel=0.03)
    # No common horizon at d = 1.4 M; one at d = 0.45 M (well below the equal-mass 0.766 M threshold,
    # Brill & Lindquist 1963 / Cadez 1974, from memory), whose mass is close to the total bare mass 1.
    assert expected["common"][0][2] is False
    assert expected["common"][-1][2] is True
    assert expected["common"][-1][3] == pytest.approx(1.0, abs=0.02)


def test_summary_states_the_rows(small_archive):
    path, expected = small_archive
    record = load_run(path)
    assert record.labels == ("heavy", "light", "common")
    assert record.merged_labels == ("common",)
    summary = summarise(record)
    first_common = min((t, it) for t, it, found, _ in expected["common"] if found)
    assert (summary.common_first_time, summary.common_first_iteration) == pytest.approx(first_common)
    assert summary.common_label == "common"
    assert summary.slices_skipped == 1 and summary.slices_processed == len(expected["heavy"])
    assert summary.skipped_iterations == expected["skipped_iterations"]
    for label in ("heavy", "light", "common"):
        last = [row for row in expected[label] if row[2]][-1]
        assert summary.surface(label).final_irreducible_mass == pytest.approx(last[3], rel=1e-12)
        assert summary.surface(label).found == sum(row[2] for row in expected[label])
    text = summary_text(summary)
    assert f"first found at t = {first_common[0]:.4f} M, iteration {first_common[1]}" in text
    assert "1 skipped" in text


def test_report_writes_pngs_and_a_summary(small_archive, tmp_path):
    path, expected = small_archive
    result = write_report(path, tmp_path / "out")
    names = sorted(p.name for p in result.plots)
    assert names == ["areas_masses.png", "cross_sections.png", "tracks.png"]
    for plot in result.plots:
        width, height = _png_size(plot)
        assert width > 300 and height > 300
        assert plot.stat().st_size > 10_000  # not an empty canvas
    assert result.summary_path.read_text().startswith("run run-0123456789ab")
    # Default cross-section times include the first common horizon.
    assert result.summary.common_first_time in result.section_times


def test_cross_section_plot_draws_one_curve_per_found_surface_at_the_chosen_time(small_archive, tmp_path):
    # Indirect but real: plotting at a time with three found surfaces differs from one with two.
    path, expected = small_archive
    t_two = expected["common"][0][0]       # no common surface there
    t_three = expected["common"][-1][0]    # common surface found
    a = write_report(path, tmp_path / "a", times=(t_two,)).plots[2].read_bytes()
    b = write_report(path, tmp_path / "b", times=(t_three,)).plots[2].read_bytes()
    assert a != b


def test_report_command_line(small_archive, tmp_path, capsys):
    path, _ = small_archive
    status = main(["report", str(path), "--output", str(tmp_path / "cli"), "--times", "0,2.8"])
    out = capsys.readouterr()
    assert status == 0
    assert "common horizon (common) first found" in out.out
    assert (tmp_path / "cli" / "tracks.png").exists()
    assert "report: 5/5" in out.err  # progress lines


def test_report_of_a_missing_archive_fails_with_a_reason(tmp_path, capsys):
    status = main(["report", str(tmp_path / "nope.zarr")])
    assert status == 2
    assert "no such path" in capsys.readouterr().err
