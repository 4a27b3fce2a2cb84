"""Verification cases (crowdcore.verify) at reduced sizes that still test each claim.
Sources and markers: ../shared/REFERENCES.md. The full suite: `crowdcore verify`."""
import os

import numpy as np
import pytest

from crowdcore import verify
from crowdcore.errors import ScenarioError


def test_demographic_speeds_reproduce_input():
    # RiMEA guideline test 7 [M]; age bands Zhou, Klein & Mayer 2015 Table 1 [V]
    r = verify.case_demographics(quick=True)
    assert r["passed"], r["values"]


def test_counterflow_last_arrival_rises():
    # IMO MSC.1/Circ.1533 test 8 [M], reduced to 40 persons with 0/4/20/40 against them
    r = verify.case_counterflow(quick=True)
    assert r["passed"], r["values"]


def test_bottleneck_specific_flow_band_and_linear():
    # Seyfried et al. 2009 [V] linear growth; lab flows 1.6-2.0 [M]; Hoogendoorn & Daamen 2005 [V, D];
    # 115 persons per metre of width (Liao et al. [V]); band 1.0-2.0 /(m s)
    r = verify.case_bottleneck(quick=True)
    assert r["passed"], r["values"]


@pytest.fixture(scope="module")
def fd_quick():
    return verify.case_fundamental_diagram(quick=True)


def test_fundamental_diagram_periodic_corridor(fd_quick):
    # Weidmann 1993 [M] and SFPE hydraulic relation [M]; band = envelope +-0.25 m/s (one sd of free speed [V])
    v = fd_quick["values"]
    pts = v["points"]
    assert v["seam_overlaps"]["pair_frames_over_1pct"] == 0, v     # interaction across the seam holds bodies apart
    for p in pts:
        assert p["ring_density"] == p["nominal"], p                 # the ring keeps every agent
        assert abs(p["density"] - p["nominal"]) <= 0.1 * p["nominal"], p   # no plug, no thinning (common practice)
    below = [p for p in pts if p["nominal"] <= 2.0]
    assert all(p["inside"] for p in below), pts
    assert all(b["speed"] < a["speed"] for a, b in zip(below, below[1:])), pts


def test_fundamental_diagram_inside_band(fd_quick):
    # Weidmann 1993 [M] and SFPE hydraulic relation [M]; band = envelope +-0.25 m/s (one sd of free speed [V])
    assert fd_quick["passed"], fd_quick["values"]


def test_band_definitions():
    # Weidmann 1993 derived values [D]: 0.5 -> 1.30, 1 -> 1.06, 2 -> 0.61, 3 -> 0.33, 4 -> 0.16
    assert np.allclose(verify.weidmann([0.5, 1, 2, 3, 4]), [1.30, 1.06, 0.61, 0.33, 0.16], atol=0.01)
    # SFPE [M]: S = 1.4 - 0.266*1.4*D
    assert verify.sfpe(1.0) == pytest.approx(1.4 * (1 - 0.266))
    lo, hi = verify.fd_band(np.array([2.0]))
    assert lo[0] == pytest.approx(0.61 - 0.25, abs=0.01) and hi[0] == pytest.approx(0.655 + 0.25, abs=0.01)


def test_report_carries_caution_and_cases(tmp_path, monkeypatch):
    fake = {"passed": True, "values": {"x": 1}}
    monkeypatch.setattr(verify, "CASES", [(k, t, s, m, lambda quick, _f=fake: _f) for k, t, s, m, _ in verify.CASES])
    path = verify.run_verification(str(tmp_path), quick=True, progress=False)
    text = open(path, encoding="utf-8").read()
    assert verify.CAUTION in text and "never replaces" in text
    for _k, title, source, marker, _ in verify.CASES:
        assert title in text and source in text and marker in text
    assert os.path.basename(path) == "report.md"


def test_report_verifies_the_users_settings(tmp_path, monkeypatch):
    seen = []

    def case(quick, out_dir=None):
        w = verify._world(seed=1)
        seen.append((w.params.orca_tau, w.params.weights["avoidance"]))
        return {"passed": True, "values": {}}

    monkeypatch.setattr(verify, "CASES", [("only", "One case", "a source", "[M]", case)])
    path = verify.run_verification(str(tmp_path), quick=True, progress=False,
                                   params={"orca_tau": 1.5, "weights": {"avoidance": 2.0}})
    assert seen == [(1.5, 2.0)]
    assert "orca_tau = 1.5" in open(path, encoding="utf-8").read()
    assert verify._world().params.orca_tau != 1.5          # the settings do not leak into later worlds
    with pytest.raises(ScenarioError, match="params.orca_tau"):
        verify.run_verification(str(tmp_path), quick=True, progress=False, params={"orca_tau": -1})
