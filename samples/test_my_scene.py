"""Example: a team's own pytest file using crowdcore's test kit. Run: python -m pytest samples/test_my_scene.py"""
from hypothesis import given, settings

from crowdcore.testing import assert_invariants, check_snapshot_round_trip, scenes


@settings(max_examples=25, deadline=None, derandomize=True)
@given(spec=scenes(min_agents=4, max_agents=12, room=(8.0, 12.0), dt=(0.05, 0.1)))
def test_my_rooms_keep_the_invariants(spec):
    world = spec.build()                     # or build your own World from spec's fields
    assert_invariants(world, frames=40)      # no overlap > 1%, no wall crossing, speeds capped, finite


@settings(max_examples=5, deadline=None, derandomize=True)
@given(spec=scenes(max_agents=8))
def test_my_saves_resume_identically(spec):
    check_snapshot_round_trip(spec.build(), frames_before=5, frames_after=10)
