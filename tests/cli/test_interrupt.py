"""Interrupted runs leave nothing behind: Ctrl-C (SIGINT) or a kill (SIGKILL) in the middle of a
long ``events`` or ``fix`` writes no result and no temporary file, leaves an earlier result and
the inputs untouched, and a rerun works.  An interrupted ``batch`` keeps the results of the
tasks that finished and ``--resume`` does the rest.

The recording is 6 minutes of low-level noise at 4 kHz (five mics, ~14 MB in a temporary
folder) with one bang 10 s before the end, so a run spends a while scanning.  The signal is
sent once the child has read its modules and a quarter of the file (``rchar`` in
``/proc/PID/io``, Linux), i.e. while it is certainly still scanning.  Results are written with
a temp file + rename (``locate.results.documents.write_atomic``).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import soundfile

from locate.synth import Emission, Waveform, simulate_events
from tests.cli_helpers import digest
from tests.scenes import ARRAY_40M

RATE_HZ = 4000
MINUTES = 6.0
BANG_AT_S = MINUTES * 60.0 - 10.0
SOURCE_M = np.array([12.0, 25.0, 0.0])
REPO = Path(__file__).resolve().parents[2]
# at 12 degC, 70 % RH: Cramer 1993 (331.3 + 0.606 T m/s dry, about +0.6 m/s humid: from memory)
SPEED_MPS = 339.17

pytestmark = pytest.mark.skipif(not Path("/proc/self/io").exists(),
                                reason="needs /proc/PID/io (Linux) to know a run is mid-way")


@pytest.fixture(scope="module")
def long_site(tmp_path_factory):
    folder = tmp_path_factory.mktemp("long")
    rng = np.random.default_rng(8)
    n = int(MINUTES * 60 * RATE_HZ)
    x = (2e-3 * rng.standard_normal((n, len(ARRAY_40M)))).astype(np.float32)
    wf = Waveform(kind="impulse", band_hz=(150.0, 1500.0), duration_s=0.08, rms_pa_at_1m=5.0)
    sim = simulate_events(ARRAY_40M, [Emission(SOURCE_M, 0.3, wf)], sample_rate_hz=RATE_HZ,
                          duration_s=1.0, temperature_c=12.0, relative_humidity=70.0, rng=rng)
    assert abs(sim.sound_speed_mps - SPEED_MPS) < 0.01
    k = int((BANG_AT_S - 0.3) * RATE_HZ)
    x[k:k + RATE_HZ] += (sim.signals.T / 10.0).astype(np.float32)
    soundfile.write(folder / "rec.wav", x, RATE_HZ, subtype="PCM_16")
    lines = ['title = "Night survey at Holloway Cut"', "", "[air]", "temperature_c = 12.0",
             "relative_humidity = 70.0", "", "[recording]", 'file = "rec.wav"', ""]
    for k, (px, py, pz) in enumerate(ARRAY_40M, 1):
        lines += ["[[mics]]", f'name = "M{k}"', f"x = {px}", f"y = {py}", f"z = {pz}",
                  f"channel = {k}", ""]
    (folder / "site.toml").write_text("\n".join(lines))
    return folder


def _env():
    return dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))


def _default_sigint():
    # A test run started in the background of a non-interactive shell inherits SIGINT ignored,
    # and Python keeps an ignored SIGINT ignored; a terminal's Ctrl-C reaches a foreground
    # process with the default disposition, which is what these tests stand for.
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def _start(args, **kwargs):
    return subprocess.Popen([sys.executable, "-m", "locate", *map(str, args)], env=_env(),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            preexec_fn=_default_sigint, **kwargs)


@pytest.fixture(scope="module")
def startup_bytes():
    """Bytes a child reads to start up and import the commands' modules (.py/.pyc files)."""
    code = ("import locate.cli, locate.io.audio, locate.workflows.fixing, "
            "locate.results.documents, locate.io.site, locate.fix.solver, locate.signal.events, "
            "locate.signal.delays; from pathlib import Path; "
            "print(next(ln.split()[1] for ln in Path('/proc/self/io').read_text().splitlines()"
            " if ln.startswith('rchar:')))")
    out = subprocess.run([sys.executable, "-c", code], env=_env(), capture_output=True,
                         text=True, check=True)
    return int(out.stdout.strip())


def _threshold(long_site, startup_bytes):
    """Read this much and the child is past its imports and a quarter into the recording."""
    return startup_bytes + (long_site / "rec.wav").stat().st_size // 4


def _bytes_read(pid) -> int:
    try:
        text = Path(f"/proc/{pid}/io").read_text()
    except OSError:
        return 0
    return int(next(ln.split()[1] for ln in text.splitlines() if ln.startswith("rchar:")))


def _interrupt_mid_run(proc, sig, threshold_bytes):
    """Send ``sig`` once the child has read ``threshold_bytes``; returns (code, stderr)."""
    while _bytes_read(proc.pid) < threshold_bytes:
        if proc.poll() is not None:
            out, err = proc.communicate()
            pytest.fail(f"the run ended before it could be interrupted (exit {proc.returncode}):"
                        f" make the recording longer\n{err}")
        try:
            proc.wait(timeout=0.01)
        except subprocess.TimeoutExpired:
            pass
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=60)
    return proc.returncode, err


def _listing(folder):
    return sorted(p.name for p in folder.iterdir())


@pytest.mark.parametrize("command, sig, target", [
    ("events", signal.SIGINT, "new.json"),
    ("events", signal.SIGKILL, "new.json"),
    ("fix", signal.SIGINT, "earlier.json"),  # over a result an earlier run wrote
    ("fix", signal.SIGKILL, "earlier.json"),
], ids=["events-sigint-then-rerun", "events-sigkill", "fix-sigint-over-earlier-then-rerun",
        "fix-sigkill-over-earlier"])
def test_an_interrupted_run_leaves_no_result_and_no_temp_file(long_site, startup_bytes,
                                                               tmp_path, command, sig, target):
    old = tmp_path / "earlier.json"
    old.write_text('{"schema": "tdoa-result/1", "kind": "events", "note": "an earlier run"}\n')
    inputs = [long_site / "site.toml", long_site / "rec.wav"]
    before = digest(inputs + [old])
    listing = _listing(long_site), _listing(tmp_path)
    proc = _start([command, long_site / "site.toml", "--json", tmp_path / target])
    code, err = _interrupt_mid_run(proc, sig, _threshold(long_site, startup_bytes))
    if sig == signal.SIGINT:
        assert code == 130, err  # the shell's convention for Ctrl-C: 128 + SIGINT
        assert err.strip().splitlines()[-1] == ("tdoa: interrupted; no partial result was "
                                                "written"), err
        assert "Traceback" not in err
    else:
        assert code == -signal.SIGKILL
    assert not (tmp_path / "new.json").exists()  # no result file
    assert (_listing(long_site), _listing(tmp_path)) == listing  # no .new.json.*.part either
    assert digest(inputs + [old]) == before  # inputs and the earlier result untouched
    if sig == signal.SIGINT:
        _rerun_works(long_site, tmp_path, command)


def _rerun_works(long_site, folder, command):
    out = folder / "rerun.json"
    proc = _start([command, long_site / "site.toml", "--json", out])
    _, stderr = proc.communicate(timeout=300)
    assert proc.returncode == 0, stderr
    result = json.loads(out.read_text())
    if command == "events":
        (event,) = result["events"]
        # the scene's truth: the bang leaves at BANG_AT_S and first reaches the nearest mic
        # after distance / sound speed; onsets are found on 5 ms frames
        first_heard_s = BANG_AT_S + np.min(np.linalg.norm(ARRAY_40M - SOURCE_M, axis=1)) \
            / SPEED_MPS
        assert abs(event["t_s"] - first_heard_s) < 0.01
    else:
        (f,) = result["fixes"]
        assert np.linalg.norm(np.array(f["position_m"][:2]) - SOURCE_M[:2]) < 0.5  # metres
    assert sorted(p.name for p in folder.iterdir()) == ["earlier.json", "rerun.json"]


def test_an_interrupted_batch_keeps_finished_results_and_resume_does_the_rest(long_site,
                                                                               tmp_path):
    # Ctrl-C in a terminal reaches the whole process group (the batch and its workers): the
    # finished tasks keep their (complete) results, the running ones write nothing, and
    # --resume runs only what is missing.  Common practice for resumable batch runners.
    out = tmp_path / "out"
    site = (long_site / "site.toml").as_posix()
    lines = ["[defaults]", f'output_dir = "{out.as_posix()}"', ""]
    for k in range(1, 9):
        lines += ["[[task]]", f'name = "scan-{k}"', f'site = "{site}"', 'command = "events"', ""]
    manifest = tmp_path / "jobs.toml"
    manifest.write_text("\n".join(lines))
    proc = _start(["batch", manifest, "--jobs", "2"], start_new_session=True)
    while not out.exists() or len(list(out.glob("scan-*.json"))) < 2:
        if proc.poll() is not None:
            pytest.fail(f"the batch ended before it could be interrupted:\n{proc.stderr.read()}")
        try:
            proc.wait(timeout=0.01)
        except subprocess.TimeoutExpired:
            pass
    os.killpg(proc.pid, signal.SIGINT)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    assert "Traceback" not in err
    assert "rerun with --resume" in err
    assert err.strip().splitlines()[-1] == "tdoa: interrupted; no partial result was written"
    kept = sorted(p.name for p in out.iterdir())
    assert 2 <= len(kept) < 8 and all(n.startswith("scan-") and n.endswith(".json")
                                      for n in kept), kept  # no temp files, no summary yet
    for name in kept:  # every file left is a whole result
        (event,) = json.loads((out / name).read_text())["events"]
        assert abs(event["t_s"] - BANG_AT_S) < 0.2
    proc = subprocess.run([sys.executable, "-m", "locate", "batch", str(manifest), "--resume",
                           "--jobs", "2"], env=_env(), capture_output=True, text=True,
                          timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert f"{8 - len(kept)} done, 0 found nothing, {len(kept)} skipped" in proc.stdout
    assert len(list(out.glob("scan-*.json"))) == 8
