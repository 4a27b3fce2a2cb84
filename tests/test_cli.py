"""The command line, end to end (in-process, through crowdcore.cli.main)."""
import json
import os

from PIL import Image

from crowdcore.cli import main
from crowdcore.records import RecordSet

ROOT = os.path.join(os.path.dirname(__file__), "..")


def test_run_writes_summary_and_pictures(tmp_path, capsys):
    rc = main(["run", "corner", "--frames", "60", "--out", str(tmp_path), "--json", "--quiet"])
    assert rc == 0
    summary = json.loads(capsys.readouterr().out.strip().splitlines()[-1])
    for key in ("agents_at_start", "frames", "ms_per_frame_median", "arrivals", "min_separation_m",
                "overlap_pair_frames", "wall_crossings", "mean_speed_m_s"):
        assert key in summary
    assert summary["frames"] == 60 and summary["agents_at_start"] == 20
    assert summary["wall_crossings"] == 0 and summary["overlap_pair_frames"] == 0
    gif = Image.open(tmp_path / "corner.gif")
    assert gif.n_frames > 10
    assert Image.open(tmp_path / "corner.png").size[0] > 500


def test_run_prints_caution(tmp_path, capsys):
    assert main(["run", "corridor", "--frames", "5", "--no-pictures", "--quiet"]) == 0
    assert "never replace" in capsys.readouterr().out


def test_bad_scene_is_a_clear_error(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text("[[spawns]]\nrect = [0, 0, 1, 1]\ncount = -3\n")
    assert main(["run", str(bad), "--quiet", "--no-pictures"]) == 2
    assert "spawns[0].count: must be a positive integer, got -3" in capsys.readouterr().err
    assert main(["run", "no-such-scene"]) == 2


def test_records_build(tmp_path, capsys):
    out = tmp_path / "mine.records"
    csv = os.path.join(ROOT, "samples", "trajectories", "walkers_small.csv")
    assert main(["records", "build", csv, "--fps", "10", "--buckets", "10", "-o", str(out), "--quiet"]) == 0
    rs = RecordSet.load(out)
    assert rs.n_buckets == 10 and rs.n_records > 100


def test_scenes_lists_bundled(capsys):
    assert main(["scenes"]) == 0
    out = capsys.readouterr().out
    for name in ("crossing", "corner", "hall", "corridor"):
        assert name in out


def test_run_with_a_budget_reports_the_governor_choice(capsys):
    assert main(["run", "corner", "--frames", "5", "--no-pictures", "--quiet", "--json", "--budget-ms", "0.001"]) == 0
    summary = json.loads(capsys.readouterr().out.strip().splitlines()[-1])
    # a budget nothing can meet: the governor drops to the narrowest search it allows
    assert summary["budget_ms"] == 0.001 and summary["last_search_width"] == 0 and summary["last_neighbours"] == 4


def test_verify_takes_the_params_of_a_scenario_file(tmp_path, monkeypatch, capsys):
    import crowdcore.verify as verify
    got = {}
    monkeypatch.setattr(verify, "run_verification",
                        lambda out, quick=False, progress=True, params=None: got.update(params=params) or "r.md")
    scene = tmp_path / "mine.toml"
    scene.write_text("[params]\norca_tau = 1.5\n[params.weights]\navoidance = 2.0\n")
    assert main(["verify", "--quick", "--quiet", "--params", str(scene), "--out", str(tmp_path)]) == 0
    assert got["params"]["orca_tau"] == 1.5 and got["params"]["weights"]["avoidance"] == 2.0
    assert "never replace" in capsys.readouterr().out
