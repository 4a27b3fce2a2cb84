"""The C ABI from C: error cases, the sample host against the Python API bit for bit, flags, header.

The library is built once per session into a temporary folder; C programs are compiled with gcc and
run as separate processes (the embedded interpreter must start with no help from the environment).
"""
import os
import re
import shutil
import subprocess

import numpy as np
import pytest

import crowdcore
from crowdcore import cabi

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
GCC = shutil.which("gcc")
pytestmark = pytest.mark.skipif(GCC is None, reason="gcc not found: the C ABI tests compile C programs")
HALL = os.path.join(ROOT, "samples", "scenes", "hall.toml")


@pytest.fixture(scope="session")
def native(tmp_path_factory):
    out = str(tmp_path_factory.mktemp("cabi"))
    cabi.build_library(out)
    # Fill the kernel cache in this process first, so the C processes load kernels instead of compiling.
    w = crowdcore.load_scenario(HALL)
    w.step(0.1)
    return out


def host_env(**extra):
    """The test's environment without any Python path hints (and with misleading ones, to be sure)."""
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME", "VIRTUAL_ENV")}
    env.update(PYTHONPATH="/nonexistent-pythonpath", PYTHONHOME="/nonexistent-pythonhome")
    env.update(extra)
    return env


def compile_c(native, source, exe, *more):
    # exactly the documented host build line: gcc host.c $(crowdcore cabi --cflags --libs)
    flags = (cabi.cflags(native) + " " + cabi.libs(native)).split()
    cmd = [GCC, "-std=c99", "-O2", "-Wall", "-Wextra", source, "-o", exe, *flags, *more]
    r = subprocess.run(cmd, capture_output=True, text=True)
    assert r.returncode == 0, f"{' '.join(cmd)}\n{r.stderr}"
    return exe


def test_c_host_matches_python_bit_for_bit(native, tmp_path):
    ref = crowdcore.load_scenario(HALL)
    for _ in range(600):
        ref.step(0.1)
    exe = compile_c(native, os.path.join(ROOT, "samples", "c_host", "host.c"), str(tmp_path / "host"))
    csv = tmp_path / "positions.csv"
    r = subprocess.run([exe, HALL, "600", str(csv)], capture_output=True, text=True, cwd=tmp_path, env=host_env(),
                       timeout=600)
    assert r.returncode == 0, r.stdout + r.stderr
    assert re.search(r"frames\s+600 ", r.stdout), r.stdout
    rows = np.loadtxt(csv, delimiter=",", skiprows=1, ndmin=2, dtype=str)
    assert len(rows) == ref.agent_count > 0            # hall keeps agents after 600 frames
    ids = rows[:, 0].astype(np.int32)
    pos = np.array([[float(x), float(y)] for x, y in rows[:, 1:]])   # %.17g round-trips exactly
    assert np.array_equal(ids, ref.ids)
    assert np.array_equal(pos.view(np.uint64), np.ascontiguousarray(ref.positions).view(np.uint64))
    assert f"state hash       {ref.state_hash()}" in r.stdout


def test_every_error_case_from_c(native, tmp_path):
    exe = compile_c(native, os.path.join(ROOT, "tests", "c", "test_errors.c"), str(tmp_path / "test_errors"), "-lm")
    r = subprocess.run([exe], capture_output=True, text=True, cwd=tmp_path, env=host_env(), timeout=600)
    lines = r.stdout.splitlines()
    failed = [ln for ln in lines if ln.startswith("FAIL")]
    assert r.returncode == 0 and not failed, r.stdout + r.stderr
    assert lines and lines[-1].endswith(", 0 failures"), r.stdout + r.stderr
    text = r.stdout
    for case in ("stale handle step", "create NULL def", "step NaN", "step negative dt", "positions capacity too small",
                 "remove unknown id", "garbage snapshot", "world unchanged by all the refused calls",
                 "buffer rows equal the agents' positions", "buffer beyond count untouched", "set_params NaN",
                 "set_params unknown key", "the step used the new search width and neighbour count",
                 "snapshot after a step holds the stepped state",
                 "step_seconds is within the call's wall time, and most of it"):
        assert f"ok   {case}" in text, case


def test_flags_and_describe(native):
    assert cabi.cflags(native) == f"-I{native}"
    libs = cabi.libs(native)
    assert f"-L{native}" in libs and "-lcrowdcore" in libs and f"-Wl,-rpath,{native}" in libs
    assert os.path.exists(cabi.library_path(native)) and os.path.exists(os.path.join(native, "crowdcore.h"))
    assert "(built)" in cabi.describe(native)
    with open(os.path.join(ROOT, "bindings", "crowdcore.h")) as f:
        header = f.read()
    version = tuple(int(re.search(rf"#define CC_ABI_VERSION_{part} (\d+)", header).group(1))
                    for part in ("MAJOR", "MINOR", "PATCH"))
    assert cabi.ABI_VERSION == version      # what `crowdcore cabi` prints is what the header declares


def test_header_documents_every_exported_call(native):
    with open(os.path.join(ROOT, "bindings", "crowdcore.h")) as f:
        header = f.read()
    decls = [ln for ln in header.splitlines() if ln.startswith("CC_API ")]
    names = {re.search(r"\b(cc_\w+)\(", ln).group(1) for ln in decls}
    assert len(names) == len(decls) >= 30
    undocumented = [ln for ln in decls if "/*" not in ln]
    assert not undocumented, undocumented
    nm = shutil.which("nm")
    if nm:
        out = subprocess.run([nm, "-D", "--defined-only", cabi.library_path(native)], capture_output=True,
                             text=True).stdout
        exported = {m.group(1) for m in re.finditer(r"\s[TW]\s(cc_\w+)$", out, re.M)}
        assert exported == names, (exported ^ names)


def test_recording_and_replay_from_c(native, tmp_path):
    exe = compile_c(native, os.path.join(ROOT, "tests", "c", "test_recording.c"), str(tmp_path / "rec"))
    rec = tmp_path / "run.rec"
    corner = os.path.join(ROOT, "samples", "scenes", "corner.toml")
    r = subprocess.run([exe, corner, str(rec)], capture_output=True, text=True, env=host_env(), timeout=600)
    assert r.returncode == 0 and "ALL OK" in r.stdout, r.stdout + r.stderr
    # the same file replays identically through the Python API too
    from crowdcore.recording import replay
    report = replay(rec)
    assert report.identical and report.frames_checked == 50


def test_busy_world_and_worlds_on_two_threads_from_c(native, tmp_path):
    exe = compile_c(native, os.path.join(ROOT, "tests", "c", "test_threads.c"), str(tmp_path / "threads"), "-pthread")
    r = subprocess.run([exe], capture_output=True, text=True, env=host_env(), timeout=600)
    assert r.returncode == 0 and r.stdout.rstrip().endswith("threads: 0 failures"), r.stdout + r.stderr
    for case in ("a second thread got CC_ERR_BUSY while the world stepped",
                 "the busy world made exactly the steps that were accepted",
                 "a world stepped beside a busy one equals the same world stepped alone",
                 "100 short-lived threads each stepped once, as one thread would"):
        assert f"ok   {case}" in r.stdout, case
