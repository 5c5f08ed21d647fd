"""Wall time of the demo, quiet and with one core kept busy. Measures and prints; passes nothing.

    python -m benchmarks.demo [--config configs/demo.toml] [--threads 1] [--against COMMIT ...]

Runs `rehedge run CONFIG --quiet` in a fresh process twice: once as the machine is, once while
another process spins on one core (a pure-Python busy loop, the load a desk's shared machine
sees). Prints both wall times, their ratio, and whether the two runs wrote the same metrics.json
(they must: same seed, same config). With ``--against COMMIT`` the same two runs are made with that
commit's code (checked out in a temporary git worktree; repeatable), interleaved with this tree's
so all see the same machine, and this tree's time over each commit's and whether their metrics agree
byte for byte are printed. Targets, printed, never asserted: <= 60 s quiet and loaded <= 1.5 x quiet on a 2-core
machine.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from benchmarks.__main__ import ROOT, machine

BUSY_LOOP = "while True: pass"


def timed_run(config: Path, runs_dir: Path, threads: int, code: Path = ROOT) -> tuple[float, bytes]:
    """(wall seconds, metrics.json bytes) of one `rehedge run` in a new process, with the code of
    the tree ``code``."""
    command = [sys.executable, "-m", "rehedge.cli", "run", str(config), "--quiet",
               "--runs-dir", str(runs_dir), "--threads", str(threads)]
    environment = {**os.environ, "PYTHONPATH": str(code)}
    started = time.perf_counter()
    subprocess.run(command, check=True, stdout=subprocess.DEVNULL, cwd=code, env=environment)
    seconds = time.perf_counter() - started
    (folder,) = [path for path in runs_dir.iterdir() if path.is_dir()]
    return seconds, (folder / "metrics.json").read_bytes()


def measure(config: Path, folder: Path, threads: int, trees: dict[str, Path]) -> dict[str, dict[str, tuple]]:
    """Each tree's quiet and loaded (seconds, metrics) runs, the trees interleaved."""
    seen: dict[str, dict[str, tuple]] = {name: {} for name in trees}
    for condition in ("quiet", "loaded"):
        busy = subprocess.Popen([sys.executable, "-c", BUSY_LOOP]) if condition == "loaded" else None
        try:
            for name, code in trees.items():
                seen[name][condition] = timed_run(config, folder / f"{name}-{condition}", threads, code)
                print(f"{name:>8} {condition:>6}: {seen[name][condition][0]:6.1f} s", flush=True)
        finally:
            if busy is not None:
                busy.kill()
                busy.wait()
    return seen


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--config", type=Path, default=ROOT / "configs" / "demo.toml")
    parser.add_argument("--threads", type=int, default=1, help="passed to rehedge run --threads")
    parser.add_argument("--against", action="append", default=[],
                        help="a git commit whose code runs beside this tree's (repeatable)")
    args = parser.parse_args()
    print(f"rehedge demo wall time: {machine()}", flush=True)
    with tempfile.TemporaryDirectory(prefix="rehedge-bench-demo-") as folder:
        folder = Path(folder)
        trees = {"this": ROOT}
        try:
            for commit in args.against:
                trees[commit] = folder / f"tree-{commit}"
                subprocess.run(["git", "-C", str(ROOT), "worktree", "add", "--detach", str(trees[commit]), commit],
                               check=True, capture_output=True)
            seen = measure(args.config.resolve(), folder, args.threads, trees)
        finally:
            for commit in args.against:
                subprocess.run(["git", "-C", str(ROOT), "worktree", "remove", "--force", str(trees[commit])],
                               check=False, capture_output=True)
    for name, runs in seen.items():
        (quiet_s, quiet_metrics), (loaded_s, loaded_metrics) = runs["quiet"], runs["loaded"]
        print(f"{name}: quiet {quiet_s:.1f} s (target <= 60 s), loaded {loaded_s:.1f} s (one core kept busy), "
              f"ratio {loaded_s / quiet_s:.2f} x (target <= 1.5 x); metrics.json identical in both runs: "
              + ("yes" if quiet_metrics == loaded_metrics else "NO"))
    this = seen["this"]
    for commit in args.against:
        other = seen[commit]
        ratios = ", ".join(f"{condition} {this[condition][0] / other[condition][0]:.2f} x"
                           for condition in ("quiet", "loaded"))
        same = "yes" if this["quiet"][1] == other["quiet"][1] else "NO"
        print(f"this tree over {commit}: {ratios}; metrics.json identical: {same}")


if __name__ == "__main__":
    main()
