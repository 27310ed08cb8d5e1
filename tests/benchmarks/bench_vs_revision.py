"""Cost of the current checkout against an earlier revision, on the same machine, interleaved.

    python tests/benchmarks/bench_vs_revision.py REVISION [--map FILE] [--repeats N]
        [--extra "ARGS"]

Checks REVISION out into a temporary git worktree (no install: it runs with ``PYTHONPATH``
pointing at it, with this interpreter), then times ``python -m polkit.cli dispersion MAP
--seed 1 --quiet`` for the old and the current code in turn, ``--repeats`` times each,
interleaved so that a change in the machine's load hits both alike.  Prints wall and CPU
seconds (children's user + system) per run and the ratios current / old of the medians.
Measures only; asserts nothing.  Numba caches compile per checkout, so one untimed warm-up
run of each comes first.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shlex
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def _run(code_root: Path, map_path: Path, extra: list[str], out: Path) -> tuple[float, float]:
    env = dict(os.environ, PYTHONPATH=str(code_root))
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-m", "polkit.cli", "dispersion", str(map_path), "--seed",
                    "1", "--quiet", "--out", str(out), *extra], env=env, check=False,
                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, cwd=code_root)
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("revision")
    ap.add_argument("--map", type=Path, default=ROOT / "data_examples" / "ds1_p1_emission.nc")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--extra", default="", help="further options of the dispersion command")
    args = ap.parse_args(argv)
    extra = shlex.split(args.extra)
    with tempfile.TemporaryDirectory() as tmp:
        old = Path(tmp) / "old"
        subprocess.run(["git", "-C", str(ROOT), "worktree", "add", "--detach", str(old),
                        args.revision], check=True, stdout=subprocess.DEVNULL)
        try:
            runs = {"old": [], "current": []}
            roots = {"old": old, "current": ROOT}
            for name, root in roots.items():  # warm-up: numba caches, imports
                _run(root, args.map.resolve(), extra, Path(tmp) / f"warm-{name}")
            for i in range(args.repeats):
                for name, root in roots.items():
                    wall, cpu = _run(root, args.map.resolve(), extra, Path(tmp) / f"{name}-{i}")
                    runs[name].append((wall, cpu))
                    print(f"{name:8s} run {i}: wall {wall:6.1f} s  cpu {cpu:6.1f} s", flush=True)
        finally:
            subprocess.run(["git", "-C", str(ROOT), "worktree", "remove", "--force", str(old)],
                           check=False)

    def median(xs):
        xs = sorted(xs)
        return xs[len(xs) // 2]

    res = {name: {"wall_s": median([w for w, _ in r]), "cpu_s": median([c for _, c in r])}
           for name, r in runs.items()}
    res["wall_ratio_current_over_old"] = res["current"]["wall_s"] / res["old"]["wall_s"]
    res["cpu_ratio_current_over_old"] = res["current"]["cpu_s"] / res["old"]["cpu_s"]
    res["revision"] = args.revision
    res["map"] = args.map.name
    res["load_average"] = os.getloadavg()
    print(json.dumps(res, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
