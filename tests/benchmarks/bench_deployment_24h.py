"""Benchmark (run on demand): a 24 h deployment of 5 recorders scanned and located.

Issue 20 asks that a whole deployment (recorders writing many bext-stamped files) be scanned in
memory bounded by one block: peak RSS <= 400 MB for 24 h of 5 recorders.  This script writes
such a deployment on /tmp (invented scene, tests/deployment_scene.py: low-level noise, one bang
per hour from the exact simulator, one bang straddling a file boundary, one recorder missing a
file with a bang in the gap; never committed), runs ``python -m locate fix`` on it in a child
process and reads the child's peak resident set size (``resource.getrusage(RUSAGE_CHILDREN)``,
kilobytes on Linux, read by a small launcher process: a child forked straight from this
script would count this script's own memory, which Linux carries across exec into
``ru_maxrss``).  It then checks every bang was found once, its error and its clock time.

    python tests/benchmarks/bench_deployment_24h.py                 # 24 h, 8 kHz, 60 min files
    python tests/benchmarks/bench_deployment_24h.py --hours 2 --file-minutes 1 --keep
    python tests/benchmarks/bench_deployment_24h.py --dask      # also chunked on a local Dask

With ``--dask`` the same deployment is also run as ``tdoa fix --chunk 3600 --scheduler ...`` on a
Dask cluster of 2 worker processes started on 127.0.0.1, and its fixes compared with the
single run's.

Disk: 24 h x 5 recorders x 8 kHz x 2 bytes = 6.9 GB while it runs (removed afterwards).
Not part of the default test run (pytest only collects test_*.py).
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from tests.deployment_scene import MICS5_M, parse_utc, plan_files, utc_of, write_deployment  # noqa: E402,I001

SOUND_SPEED = 336.6  # m/s at 8 degC, 60 % RH (the scene's air)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--hours", type=float, default=24.0)
    ap.add_argument("--fs", type=int, default=8000)
    ap.add_argument("--file-minutes", type=float, default=60.0)
    ap.add_argument("--folder", default="/tmp/tdoa_bench_deployment")
    ap.add_argument("--keep", action="store_true")
    ap.add_argument("--dask", action="store_true", help="also run chunked on a local Dask")
    ap.add_argument("--chunk-s", type=float, default=3600.0)
    args = ap.parse_args(argv)
    fs, total = args.fs, args.hours * 3600.0
    file_s = (0.75 * args.file_minutes * 60.0, args.file_minutes * 60.0)
    starts_s = (0.0, 3.2, 7.9, 1.4, 5.6)
    starts, plan = plan_files(fs=fs, duration_s=total, starts_s=starts_s, file_s=file_s)
    n_bangs = max(int(args.hours), 4)
    rng = np.random.default_rng(5)
    times = np.sort(rng.uniform(60.0, total - 120.0, n_bangs))
    pos = np.c_[rng.uniform(5, 55, n_bangs), rng.uniform(5, 55, n_bangs), np.ones(n_bangs)]
    # bang 1 straddles recorder 1's second file boundary; bang 2 falls in recorder 3's gap
    drop_j = min(3, len(plan[2]) - 2)
    b0 = starts[0] + (plan[0][0] + plan[0][1]) / fs
    times[1] = b0 - 0.03 - np.linalg.norm(MICS5_M[0] - pos[1]) / SOUND_SPEED
    gap_lo = starts[2] + sum(plan[2][:drop_j]) / fs
    times[2] = gap_lo + 0.5 * plan[2][drop_j] / fs
    order = np.argsort(times)
    times, pos = times[order], pos[order]
    folder = Path(args.folder)
    shutil.rmtree(folder, ignore_errors=True)
    folder.mkdir(parents=True)
    try:
        t = time.perf_counter()
        sc = write_deployment(folder, fs=fs, duration_s=total, starts_s=starts_s,
                              bang_times_s=times, positions_m=pos, drop=((2, drop_j),),
                              file_s=file_s, block_s=60.0)
        n_files = sum(p is not None for f in sc.files for p, _, _ in f)
        print(f"wrote {n_files} files, {args.hours:g} h x 5 recorders at {fs} Hz in "
              f"{time.perf_counter() - t:.0f} s")
        out = folder / "result.json"
        t = time.perf_counter()
        proc, peak_mb = _run_measured([sys.executable, "-m", "locate", "fix", str(sc.site),
                                       "--source-z", "1.0", "--json", str(out)])
        wall = time.perf_counter() - t
        if proc.returncode != 0:
            print(proc.stderr)
            raise SystemExit(f"tdoa fix failed (exit {proc.returncode})")
        r = json.loads(out.read_text())
        fixes = r["fixes"]
        first = sc.arrivals_s.min(axis=1)
        got = np.array([f["t_s"] for f in fixes])
        match = [int(np.argmin(np.abs(got - t))) for t in first]
        dt_s = np.array([abs(got[m] - t) for m, t in zip(match, first)])
        err = np.array([np.linalg.norm(np.array(fixes[m]["position_m"][:2]) - p[:2])
                        for m, p in zip(match, pos)])
        clock = np.array([abs((parse_utc(fixes[m]["t_utc"]) - utc_of(t)).total_seconds())
                          for m, t in zip(match, first)])
        print(f"tdoa fix: {wall:.0f} s wall ({total / wall:.0f}x real time), peak RSS "
              f"{peak_mb:.0f} MB (goal <= 400 MB)")
        print(f"bangs {len(first)}, fixes {len(fixes)}, matched once: "
              f"{len(set(match)) == len(first) and len(fixes) == len(first)}; "
              f"max time error {dt_s.max() * 1e3:.1f} ms; max clock error {clock.max() * 1e3:.1f}"
              f" ms; max position error {err.max():.3f} m")
        print("fix with a mic left out:", [f.get("absent_mics") for f in fixes
                                           if f.get("absent_mics")])
        if args.dask:
            _dask_run(sc, fixes, args.chunk_s, folder)
    finally:
        if not args.keep:
            shutil.rmtree(folder, ignore_errors=True)


_LAUNCHER = ("import resource, subprocess, sys\n"
             "r = subprocess.run(sys.argv[1:])\n"
             "print('PEAK_KB', resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss, "
             "file=sys.stderr)\n"
             "sys.exit(r.returncode)\n")


def _run_measured(cmd):
    """Run ``cmd`` from a small launcher; (completed process, the command's peak RSS in MB)."""
    proc = subprocess.run([sys.executable, "-c", _LAUNCHER, *cmd], capture_output=True,
                          text=True, cwd=ROOT)
    kb = [ln.split()[1] for ln in proc.stderr.splitlines() if ln.startswith("PEAK_KB ")]
    return proc, (float(kb[-1]) if kb else float("nan")) / 1024.0


def _dask_run(sc, fixes, chunk_s, folder):
    from distributed import LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None, silence_logs=40) as cluster:
        out = folder / "chunked.json"
        t = time.perf_counter()
        proc = subprocess.run([sys.executable, "-m", "locate", "fix", str(sc.site),
                               "--source-z", "1.0", "--chunk", str(chunk_s), "--scheduler",
                               cluster.scheduler_address, "--json", str(out)],
                              capture_output=True, text=True, cwd=ROOT)
        wall = time.perf_counter() - t
    if proc.returncode != 0:
        print(proc.stderr)
        raise SystemExit(f"chunked tdoa fix failed (exit {proc.returncode})")
    other = json.loads(out.read_text())["fixes"]
    same = len(other) == len(fixes) and all(
        abs(a["t_s"] - b["t_s"]) < 1e-9 and np.allclose(a["position_m"], b["position_m"],
                                                         atol=1e-9, rtol=0)
        for a, b in zip(fixes, other))
    print(f"Dask, chunks of {chunk_s:g} s on 2 workers: {wall:.0f} s wall; {len(other)} fixes, "
          f"the same as the single run: {same}")


if __name__ == "__main__":
    main()
