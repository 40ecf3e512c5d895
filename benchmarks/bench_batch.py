"""``fringe batch``: whole-process wall time against a floor, and peak memory against stack
length.

Targets (issue 5):

* A 300-frame 512 x 512 uint16 stack: the wall time of ``python -m fringe batch`` within 2x
  that of a floor process that reads every frame with tifffile and computes one numpy
  rfft2 of each (the least work a per-frame analysis does). Start-up counts.
* Peak memory on a 400-frame stack within 1.3x that on a 100-frame stack.

Both are measured on child processes: wall time with ``time.perf_counter`` around the
child, peak memory as ``ru_maxrss`` of ``getrusage(RUSAGE_CHILDREN)`` in a small wrapper
process (the largest single process of the run) and, on Linux, as the largest sampled sum
of the resident set sizes of the whole process tree (the batch process and its workers).
A profile of the measurement of a few frames in this process says where the time goes.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

_ROOT = Path(__file__).resolve().parent.parent

_FLOOR = """\
import sys
import numpy as np
import tifffile
with tifffile.TiffFile(sys.argv[1]) as tf:
    for page in tf.pages:
        np.fft.rfft2(page.asarray())
"""

# Runs the batch command through its own parser when ``fringe`` does not list it yet.
_DIRECT = """\
import argparse, sys
from fringe import batch
p = argparse.ArgumentParser(prog="fringe")
sub = p.add_subparsers(dest="command")
batch.add_parser(sub)
sys.exit(batch.run(p.parse_args(sys.argv[1:]), sys.stdout, sys.stderr))
"""

_WRAP = """\
import json, resource, subprocess, sys, time
t0 = time.perf_counter()
rc = subprocess.call(sys.argv[1:], stdout=subprocess.DEVNULL)
wall = time.perf_counter() - t0
ru = resource.getrusage(resource.RUSAGE_CHILDREN)
scale = 1 if sys.platform == "darwin" else 1024
print(json.dumps({"rc": rc, "wall_s": wall, "maxrss_bytes": ru.ru_maxrss * scale}))
"""


def _env() -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(_ROOT) + (os.pathsep + env["PYTHONPATH"]
                                      if env.get("PYTHONPATH") else "")
    return env


def _write_stacks(folder: Path, lengths: dict[str, int], shape: tuple[int, int],
                  seed: int = 2026) -> dict[str, Path]:
    """BigTIFF stacks of drifting fringes, frame k identical in every file (one pass)."""
    import tifffile

    from fringe.synth import camera, render_fringes

    rng = np.random.default_rng(seed)
    paths = {name: folder / f"{name}.tif" for name in lengths}
    writers = {name: tifffile.TiffWriter(p, bigtiff=True) for name, p in paths.items()}
    try:
        for k in range(max(lengths.values())):
            phase = 0.21 * k + 0.05 * rng.standard_normal()
            vis = 0.6 if k % 97 != 50 else 0.3
            img = render_fringes(shape, period_px=14.0, orientation_deg=20.0,
                                 phase_rad=phase, visibility=vis, mean=4000.0)
            raw = camera(img, rng=rng, gain_dn_per_e=0.5, read_noise_e=5.0, bit_depth=12)
            for name, w in writers.items():
                if k < lengths[name]:
                    w.write(raw, contiguous=False, metadata=None,
                            description='{"frame_interval_s": 0.01}' if k == 0 else None)
    finally:
        for w in writers.values():
            w.close()
    return paths


def _tree_rss_sampler(pid: int):
    """Start sampling the summed RSS of `pid` and its descendants (Linux /proc)."""
    import threading

    if not os.path.isdir("/proc"):
        return None
    state = {"peak": 0, "stop": False}
    page = os.sysconf("SC_PAGE_SIZE")

    def tree_rss() -> int:
        parents: dict[int, int] = {}
        rss: dict[int, int] = {}
        for entry in os.listdir("/proc"):
            if not entry.isdigit():
                continue
            try:
                with open(f"/proc/{entry}/stat", "rb") as fh:
                    stat = fh.read().rsplit(b")", 1)[1].split()
                with open(f"/proc/{entry}/statm", "rb") as fh:
                    resident = int(fh.read().split()[1]) * page
            except (OSError, IndexError, ValueError):
                continue
            parents[int(entry)] = int(stat[1])
            rss[int(entry)] = resident
        total = 0
        for p, r in rss.items():
            q, hops = p, 0
            while q and q != pid and hops < 64:
                q, hops = parents.get(q, 0), hops + 1
            if q == pid:
                total += r
        return total

    def loop():
        while not state["stop"]:
            state["peak"] = max(state["peak"], tree_rss())
            time.sleep(0.05)

    t = threading.Thread(target=loop, daemon=True)
    t.start()
    state["thread"] = t
    return state


def _measured(cmd: list[str]) -> dict:
    """Run `cmd` under the wrapper: rc, wall time, max RSS, peak tree RSS."""
    proc = subprocess.Popen([sys.executable, "-c", _WRAP, *cmd], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, env=_env(), text=True)
    sampler = _tree_rss_sampler(proc.pid)
    out, err = proc.communicate()
    if sampler is not None:
        sampler["stop"] = True
        sampler["thread"].join()
    try:
        res = json.loads(out.strip().splitlines()[-1])
    except (ValueError, IndexError):
        raise RuntimeError(f"benchmark child failed: {err.strip()[-500:]}") from None
    res["tree_peak_rss_bytes"] = None if sampler is None else sampler["peak"]
    res["stderr"] = err.strip()[-300:]
    return res


def _batch_cmd(direct: bool) -> list[str]:
    if direct:
        return [sys.executable, "-c", _DIRECT, "batch"]
    return [sys.executable, "-m", "fringe", "batch"]


def _cli_knows_batch() -> bool:
    r = subprocess.run([sys.executable, "-m", "fringe", "batch", "--help"],
                       capture_output=True, text=True, env=_env())
    return r.returncode == 0


def _profile(path: Path, n: int = 4) -> list[tuple[str, float]]:
    """Seconds per frame in the main stages of the measurement of `n` frames."""
    import cProfile
    import pstats

    from fringe import io
    from fringe.analyze import _measure_frame

    frames = [io.read_frame(str(path), k) for k in range(n)]
    _measure_frame(frames[0], None, None, {})  # warm up (imports, caches)
    prof = cProfile.Profile()
    t0 = time.perf_counter()
    prof.enable()
    for fr in frames:
        _measure_frame(fr, None, None, {})
    prof.disable()
    total = (time.perf_counter() - t0) / n
    stats = pstats.Stats(prof).stats  # {(file, line, name): (cc, nc, tt, ct, callers)}
    wanted = {
        "spectral_peak": "spectral search (orient.spectral_peak)",
        "project": "projection to profiles (profile.project)",
        "fit_profile": "profile fits (fit.fit_profile, all calls)",
        "least_squares": "  of which scipy least_squares",
        "_solve_linear": "  of which linear sub-solves (fit._solve_linear)",
        "choose_order": "envelope order choice (fit.choose_order)",
        "_noise_from_residuals": "noise model (analyze._noise_from_residuals)",
        "local_fringe_map": "curvature check (orient.local_fringe_map)",
        "fit_sinc2_envelope": "sinc2 envelope fit",
        "calibrate_frame": "calibration (calibrate.calibrate_frame)",
    }
    cum: dict[str, float] = {}
    for (_file, _line, name), (_cc, _nc, _tt, ct, _callers) in stats.items():
        if name in wanted:
            cum[name] = cum.get(name, 0.0) + ct / n
    rows = [("measurement of one frame (in process, profiled)", total)]
    rows += [(label, cum[name]) for name, label in wanted.items() if name in cum]
    t0 = time.perf_counter()
    for k in range(n):
        io.read_frame(str(path), k)
    rows.append(("reading one frame (io.read_frame)", (time.perf_counter() - t0) / n))
    return rows


def run(quick: bool = False) -> dict:
    """Measure the batch targets; print a table; return the numbers."""
    if quick:
        shape, n_time, n_small, n_large = (256, 256), 40, 25, 100
    else:
        shape, n_time, n_small, n_large = (512, 512), 300, 100, 400
    workers = os.cpu_count() or 1
    direct = not _cli_knows_batch()
    with tempfile.TemporaryDirectory(prefix="fringe-bench-batch-") as tmp:
        folder = Path(tmp)
        t0 = time.perf_counter()
        paths = _write_stacks(folder, {"time": n_time, "small": n_small, "large": n_large},
                              shape)
        gen_s = time.perf_counter() - t0
        floor_py = folder / "floor.py"
        floor_py.write_text(_FLOOR)
        base = _batch_cmd(direct)

        floor = _measured([sys.executable, str(floor_py), str(paths["time"])])
        full = _measured(base + [str(paths["time"]), "--out", str(folder / "t.csv")])
        fixed = _measured(base + [str(paths["time"]), "--out", str(folder / "f.csv"),
                                  "--fixed-geometry"])
        small = _measured(base + [str(paths["small"]), "--out", str(folder / "s.csv"),
                                  "--fixed-geometry"])
        large = _measured(base + [str(paths["large"]), "--out", str(folder / "l.csv"),
                                  "--fixed-geometry"])
        for name, res in (("full", full), ("fixed", fixed), ("small", small),
                          ("large", large)):
            if res["rc"] not in (0, 1):
                raise RuntimeError(f"batch run {name} exited with {res['rc']}: "
                                   f"{res['stderr']}")
        with open(folder / "t.csv", encoding="utf-8") as fh:
            rows_ok = sum(1 for line in fh if ",ok," in line)
        profile = _profile(paths["time"])

    core = profile[0][1]
    ideal = n_time * core / workers
    out = {
        "frames": n_time,
        "shape": list(shape),
        "workers": workers,
        "via": "direct parser (fringe CLI does not list batch yet)" if direct
        else "python -m fringe batch",
        "generate_s": gen_s,
        "floor_wall_s": floor["wall_s"],
        "batch_wall_s": full["wall_s"],
        "batch_fixed_wall_s": fixed["wall_s"],
        "time_ratio": full["wall_s"] / floor["wall_s"],
        "time_ratio_fixed": fixed["wall_s"] / floor["wall_s"],
        "time_target": 2.0,
        "time_target_met": full["wall_s"] <= 2.0 * floor["wall_s"],
        "rows_ok": rows_ok,
        "core_s_per_frame": core,
        "ideal_wall_s": ideal,
        "parallel_efficiency": ideal / full["wall_s"],
        "mem_small_frames": n_small,
        "mem_large_frames": n_large,
        "mem_small_maxrss_bytes": small["maxrss_bytes"],
        "mem_large_maxrss_bytes": large["maxrss_bytes"],
        "mem_ratio_maxrss": large["maxrss_bytes"] / small["maxrss_bytes"],
        "mem_small_tree_bytes": small["tree_peak_rss_bytes"],
        "mem_large_tree_bytes": large["tree_peak_rss_bytes"],
        "mem_ratio_tree": (large["tree_peak_rss_bytes"] / small["tree_peak_rss_bytes"]
                           if small["tree_peak_rss_bytes"] else None),
        "mem_target": 1.3,
        "profile_s_per_frame": {label: t for label, t in profile},
    }
    out["mem_target_met"] = out["mem_ratio_maxrss"] <= 1.3 and (
        out["mem_ratio_tree"] is None or out["mem_ratio_tree"] <= 1.3)

    mb = 1e6
    print(f"fringe batch, {n_time} frames of {shape[0]} x {shape[1]} uint16 (BigTIFF), "
          f"{workers} workers, via {out['via']}")
    print(f"  {'process':<38}{'wall s':>9}{'x floor':>9}")
    print(f"  {'floor: tifffile read + rfft2':<38}{floor['wall_s']:>9.2f}{1.0:>9.2f}")
    print(f"  {'batch':<38}{full['wall_s']:>9.2f}{out['time_ratio']:>9.1f}")
    print(f"  {'batch --fixed-geometry':<38}{fixed['wall_s']:>9.2f}"
          f"{out['time_ratio_fixed']:>9.1f}")
    fixed_ok = out["time_ratio_fixed"] <= 2.0
    print(f"  target <= 2x floor: default mode {'met' if out['time_target_met'] else 'NOT met'}"
          f", --fixed-geometry {'met' if fixed_ok else 'NOT met'}; "
          f"ideal wall time from the in-process core ({core:.3f} s/frame / {workers} "
          f"workers) {ideal:.1f} s, parallel efficiency {out['parallel_efficiency']:.0%}")
    print(f"  {'peak memory':<38}{n_small:>6} fr{n_large:>7} fr{'ratio':>8}")
    print(f"  {'largest process (ru_maxrss), MB':<38}{small['maxrss_bytes'] / mb:>9.0f}"
          f"{large['maxrss_bytes'] / mb:>10.0f}{out['mem_ratio_maxrss']:>8.3f}")
    if out["mem_ratio_tree"] is not None:
        print(f"  {'process tree (sampled sum), MB':<38}"
              f"{small['tree_peak_rss_bytes'] / mb:>9.0f}"
              f"{large['tree_peak_rss_bytes'] / mb:>10.0f}{out['mem_ratio_tree']:>8.3f}")
    print(f"  target <= 1.3x: {'met' if out['mem_target_met'] else 'NOT met'}")
    print("  where the time goes (s per frame, one process):")
    for label, t in profile:
        print(f"    {label:<52}{t:>8.4f}")
    return out


if __name__ == "__main__":
    run(quick="--quick" in sys.argv)
