"""Scenario files: errors name the key path and a bad file builds nothing."""
import os

import pytest

from crowdcore.errors import ScenarioError
from crowdcore.scenario import load_scenario, parse_scenario

GOOD = """
name = "tiny"
seed = 4
[[walls]]
points = [[0, 0], [10, 0]]
[[targets]]
name = "goal"
circle = [9, 1, 0.5]
[[spawns]]
rect = [0, 0.5, 3, 3]
count = 5
target = "goal"
"""


def test_good_scenario_builds_a_world():
    w = load_scenario(GOOD)
    assert w.agent_count == 5
    assert w.scene.targets[0].name == "goal"
    assert (w.positions[:, 1] >= 0.5).all()


@pytest.mark.parametrize("patch,message", [
    (("count = 5", "count = -3"), "spawns[0].count: must be a positive integer, got -3"),
    (("count = 5", 'count = "many"'), "spawns[0].count: must be a positive integer, got 'many'"),
    (('target = "goal"', 'target = "nowhere"'), "spawns[0].target: unknown target 'nowhere'"),
    (("circle = [9, 1, 0.5]", "circle = [9, 1]"), "targets[0].circle: must be a list of 3 numbers"),
    (("circle = [9, 1, 0.5]", "circle = [9, 1, -1]"), "targets[0].radius: must be positive"),
    (("points = [[0, 0], [10, 0]]", "points = [[0, 0]]"), "walls[0].points: needs at least 2 points"),
    (("points = [[0, 0], [10, 0]]", 'points = [[0, 0], [10, "x"]]'), "walls[0].points[1][1]: must be a number"),
    (("seed = 4", "seed = 4\ncolour = 3"), "colour: unknown key"),
    (("seed = 4", "seed = 4\n[params]\nsearch_width = -1"), "params.search_width: must be an integer in 0..1000"),
    (("seed = 4", "seed = 4\n[params]\navoidance = \"magic\""), "params.avoidance: must be one of orca, social-force"),
    (("seed = 4", "seed = 4\n[params.weights]\ndirection = -2"), "params.weights.direction: must be a finite number >= 0"),
    (("seed = 4", "seed = 4\n[params.weights]\nfun = 1"), "params.weights.fun: unknown weight"),
    (("count = 5", "count = 5000"), "spawns[0]: room for only"),
    (("name = \"tiny\"", "name = "), "not valid TOML"),
])
def test_errors_name_the_key_path(patch, message):
    text = GOOD.replace(*patch)
    assert text != GOOD
    with pytest.raises(ScenarioError) as e:
        load_scenario(text)
    assert message in str(e.value)


def test_missing_file_is_a_clear_error(tmp_path):
    with pytest.raises(ScenarioError, match="cannot read scenario"):
        load_scenario(tmp_path / "absent.toml")


def test_records_file_relative_to_scenario_and_bad_one_named(tmp_path):
    (tmp_path / "bad.records").write_bytes(b"\x00garbage")
    p = tmp_path / "s.toml"
    p.write_text(GOOD + '\n[records]\nfile = "bad.records"\n')
    with pytest.raises(ScenarioError, match="records.file: cannot load"):
        load_scenario(p)


def test_bundled_scenes_parse():
    root = os.path.join(os.path.dirname(__file__), "..", "samples", "scenes")
    names = sorted(f for f in os.listdir(root) if f.endswith(".toml"))
    assert len(names) >= 3
    for f in names:
        with open(os.path.join(root, f)) as fh:
            spec = parse_scenario(fh.read(), root, f)
        assert spec["spawns"], f
