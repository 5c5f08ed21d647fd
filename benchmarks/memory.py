"""Peak memory of a whole run at a large path count. Measures and prints; passes or fails nothing.

    python -m benchmarks.memory [--paths 1000000] [--agents linear]

In a fresh process (so the peak resident set is this job's alone): the
reference case (configs/reference-gbm.toml at 10 bps) with --paths training
and --paths held-out paths, baselines delta and a tuned Whalley-Wilmott band,
the --agents agents; simulation, tuning, collection, fitting, the held-out
evaluation with quotes (both sides of the book), the metrics files and the
report: what ``rehedge run`` does. Prints the peak RSS in MB and the seconds of
each part.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from rehedge.config import load_variants, parse_config


def peak_rss_mb() -> float:
    """Peak resident set of this process so far, MB (Linux reports KB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def child(paths: int, agents: list[str], config_path: str) -> dict:
    """The measured job, in this process."""
    from rehedge.compare import evaluate_with_quotes, write_metrics
    from rehedge.report import build_report
    from rehedge.run_folder import write_run
    from rehedge.training import train

    base = load_variants(config_path)[0].model_dump(mode="json")
    base.pop("sweep", None)
    base.update(name=f"memory-{paths}")
    base["data"].update(train_paths=paths, heldout_paths=paths)
    base["baselines"] = [{"kind": "delta"}, {"kind": "whalley_wilmott", "risk_aversion": "tune"}]
    base["agents"] = [{"kind": kind} for kind in agents]
    config = parse_config(base)
    seconds = {}
    clock = time.perf_counter()
    training = train(config)
    seconds["train"] = time.perf_counter() - clock
    seconds.update({k: v for k, v in training.timings.items()})
    with tempfile.TemporaryDirectory(prefix="rehedge-memory-") as folder:
        run_dir = write_run(training, "", Path(folder))
        clock = time.perf_counter()
        evaluation = evaluate_with_quotes(training.problem, training.policies, training.market, paths,
                                          config.data.heldout_seed, kinds=training.kinds,
                                          chunk_paths=config.data.chunk_paths, reference="delta",
                                          bootstrap_samples=config.report.bootstrap_samples)
        write_metrics(evaluation, run_dir)
        seconds["evaluate"] = time.perf_counter() - clock
        clock = time.perf_counter()
        build_report(run_dir)
        seconds["report"] = time.perf_counter() - clock
    return {"paths": paths, "steps": config.schedule.steps, "peak_rss_mb": peak_rss_mb(),
            "seconds": {k: round(v, 2) for k, v in seconds.items()}}


def measure(paths: int, agents: list[str], config_path: str = "configs/reference-gbm.toml") -> dict:
    """Run :func:`child` in a fresh Python process and return its figures."""
    out = subprocess.run([sys.executable, "-m", "benchmarks.memory", "--child", "--paths", str(paths),
                          "--agents", ",".join(agents), "--config", config_path],
                         capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--paths", type=int, default=1_000_000)
    parser.add_argument("--agents", default="linear", help="comma-separated agent kinds")
    parser.add_argument("--config", default="configs/reference-gbm.toml")
    parser.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args()
    agents = [a for a in args.agents.split(",") if a]
    if args.child:
        print(json.dumps(child(args.paths, agents, args.config)))
        return
    figures = measure(args.paths, agents, args.config)
    print(f"{figures['paths']:,} training + {figures['paths']:,} held-out paths x {figures['steps']} steps, "
          f"agents {', '.join(agents) or 'none'}: peak RSS {figures['peak_rss_mb']:.0f} MB")
    print("seconds: " + ", ".join(f"{k} {v:g}" for k, v in figures["seconds"].items()))


if __name__ == "__main__":
    main()
