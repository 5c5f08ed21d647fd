"""Wall time of the demo, quiet and with one core kept busy. Measures and prints; passes nothing.

    python -m benchmarks.demo [--config configs/demo.toml] [--threads 1]

Runs `rehedge run CONFIG --quiet` in a fresh process twice: once as the machine is, once while
another process spins on one core (a pure-Python busy loop, the load a desk's shared machine
sees). Prints both wall times, their ratio, and whether the two runs wrote the same metrics.json
(they must: same seed, same config). Targets, printed, never asserted: <= 60 s quiet and loaded
<= 1.5 x quiet on a 2-core machine.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from benchmarks.__main__ import ROOT, machine

BUSY_LOOP = "while True: pass"


def timed_run(config: Path, runs_dir: Path, threads: int) -> tuple[float, bytes]:
    """(wall seconds, metrics.json bytes) of one `rehedge run` in a new process."""
    command = [sys.executable, "-m", "rehedge.cli", "run", str(config), "--quiet",
               "--runs-dir", str(runs_dir), "--threads", str(threads)]
    started = time.perf_counter()
    subprocess.run(command, check=True, stdout=subprocess.DEVNULL, cwd=ROOT)
    seconds = time.perf_counter() - started
    (folder,) = [path for path in runs_dir.iterdir() if path.is_dir()]
    return seconds, (folder / "metrics.json").read_bytes()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--config", type=Path, default=ROOT / "configs" / "demo.toml")
    parser.add_argument("--threads", type=int, default=1, help="passed to rehedge run --threads")
    args = parser.parse_args()
    print(f"rehedge demo wall time: {machine()}", flush=True)
    with tempfile.TemporaryDirectory(prefix="rehedge-bench-demo-") as folder:
        quiet_s, quiet_metrics = timed_run(args.config.resolve(), Path(folder) / "quiet", args.threads)
        print(f"quiet:  {quiet_s:6.1f} s   (target <= 60 s)", flush=True)
        busy = subprocess.Popen([sys.executable, "-c", BUSY_LOOP])
        try:
            loaded_s, loaded_metrics = timed_run(args.config.resolve(), Path(folder) / "loaded", args.threads)
        finally:
            busy.kill()
            busy.wait()
    print(f"loaded: {loaded_s:6.1f} s   one core kept busy by another process")
    print(f"ratio:  {loaded_s / quiet_s:6.2f} x  (target <= 1.5 x)")
    print("metrics.json identical in both runs: " + ("yes" if quiet_metrics == loaded_metrics else "NO"))


if __name__ == "__main__":
    main()
