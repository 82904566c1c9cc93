"""Seconds per stage and peak memory of the full chain, for 1 and 2 workers side by side.

Run on demand (pytest does not collect ``bench_*.py``)::

    python tests/benchmarks/bench_reduce.py [--scenario NAME] [--exposures N] [--workers 1 2]

The script renders one visit (``scan-transit`` by default, e.g. ``--scenario
stare-eclipse --exposures 1000`` for the stare of the scaling benchmark), copies it once per run, and reduces each
copy with :func:`lightledger.tasks.run.reduce_visit` in a fresh Python
process (so that one run's memory high-water mark does not leak into the
next).  Worker counts alternate, ``--repeat`` runs each, and the run with the
smallest wall time of each worker count is shown.  For every stage it prints

* ``entry s``: the ``seconds`` field of the stage folder's ``entry.json``;
* ``tasks s``: the run time of every Luigi task of the stage, summed (chunks
  included), from Luigi's PROCESSING_TIME event;
* ``span s``: wall time from the first task of the stage starting to its last
  task finishing.

The two differ for stages whose summary task yields chunk tasks (calibrate,
extract): Luigi calls ``run()`` again once the chunks are done, so the time
written in ``entry.json`` covers only the summary step.

Peak memory is ``resource.getrusage(...).ru_maxrss`` of the reducing process
and of its largest finished child (Luigi runs tasks in child processes when
there is more than one worker).
"""

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

STAGES = ("calibrate", "extract", "bin", "detrend")


def child(visit_path, workers, events_path):
    """Reduce one visit in this process; print one JSON line of results."""
    import lightledger.tasks.cli  # noqa: F401  (one BLAS thread per process, before numpy loads)
    import luigi

    from lightledger.tasks.run import reduce_visit

    def cpu_now():
        me, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
        return me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime

    def record(kind):
        def handler(task, *args):
            line = {"event": kind, "family": task.task_family,
                    "stage": getattr(task, "stage", None), "time": time.time(),
                    "seconds": args[0] if args else None, "pid": os.getpid(),
                    "cpu": cpu_now(), "task": task.task_id}
            with open(events_path, "a") as fh:   # children of a forked worker append too
                fh.write(json.dumps(line) + "\n")
        return handler

    luigi.Task.event_handler(luigi.Event.START)(record("start"))
    luigi.Task.event_handler(luigi.Event.PROCESSING_TIME)(record("done"))

    t0, c0, w0 = time.perf_counter(), cpu_now(), time.time()
    result = reduce_visit(visit_path, workers=workers)
    wall = time.perf_counter() - t0
    cpu = cpu_now() - c0
    w1 = time.time()
    lines = [json.loads(s) for s in Path(events_path).read_text().splitlines() if s.strip()]
    before = min(e["time"] for e in lines) - w0 if lines else float("nan")
    after = w1 - max(e["time"] for e in lines) if lines else float("nan")
    entries = {}
    notebook = Path(visit_path).parent / "notebook"
    for entry in notebook.glob("*/entry.json"):
        doc = json.loads(entry.read_text())
        entries[doc["stage"]] = doc["seconds"]
    out = {"ok": result.ok, "messages": result.messages, "wall": wall, "entries": entries,
           "cpu": cpu, "before": before, "after": after,
           "maxrss_self_kb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss,
           "maxrss_children_kb": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss}
    print(json.dumps(out))


def summarise(events_path):
    """Per stage: summed task seconds, wall span, task count."""
    lines = [json.loads(s) for s in Path(events_path).read_text().splitlines() if s.strip()]
    stats = {}
    for stage in STAGES:
        starts = [e["time"] for e in lines if e["stage"] == stage and e["event"] == "start"]
        done = [e for e in lines if e["stage"] == stage and e["event"] == "done"]
        if not done:
            continue
        begun = {e["task"]: e["cpu"] for e in lines
                 if e["stage"] == stage and e["event"] == "start" and "task" in e}
        stats[stage] = {"tasks": sum(e["seconds"] for e in done), "n": len(done),
                        "span": max(e["time"] for e in done) - min(starts),
                        "cpu": sum(e["cpu"] - begun.get(e["task"], e["cpu"]) for e in done
                                   if "task" in e)}
    return stats


def run_one(visit_path, workers, tmp, rep=0):
    events = Path(tmp) / f"events-{workers}-{rep}.jsonl"
    proc = subprocess.run([sys.executable, __file__, "--child", str(visit_path),
                           "--workers", str(workers), "--events", str(events)],
                          capture_output=True, text=True)
    if proc.returncode != 0:
        sys.stderr.write(proc.stderr)
        raise SystemExit(f"bench_reduce: the {workers}-worker run failed")
    res = json.loads(proc.stdout.strip().splitlines()[-1])
    if not res["ok"]:
        raise SystemExit("bench_reduce: the reduction did not complete: " + "; ".join(res["messages"]))
    res["stages"] = summarise(events)
    return res


def print_table(results, n_exposures, repeat, scenario="scan-transit"):
    ws = list(results)
    print(f"\nbench_reduce: {scenario}, {n_exposures} exposures, fastest of {repeat} runs per "
          f"worker count; seconds per stage "
          f"(entry = entry.json 'seconds', tasks = all of the stage's tasks summed, "
          f"span = wall time of the stage, cpu = processor time of its tasks and of the "
          f"processes they started)")
    head = f"{'stage':<11}" + "".join(f"{f'{w}w entry':>10}{f'{w}w tasks':>10}{f'{w}w span':>10}"
                                      f"{f'{w}w cpu':>10}" for w in ws)
    print(head)
    print("-" * len(head))
    for stage in STAGES:
        row = f"{stage:<11}"
        for w in ws:
            r = results[w]
            st = r["stages"].get(stage, {})
            row += f"{r['entries'].get(stage, float('nan')):>10.2f}"
            row += f"{st.get('tasks', float('nan')):>10.2f}{st.get('span', float('nan')):>10.2f}"
            row += f"{st.get('cpu', float('nan')):>10.2f}"
        print(row)
    for label, key in (("before", "before"), ("after", "after")):
        print(f"{label:<11}" + "".join(f"{'':>20}{results[w].get(key, float('nan')):>10.2f}{'':>10}"
                                       for w in ws))
    print("-" * len(head))
    print(f"{'total':<11}" + "".join(
        f"{sum(results[w]['entries'].values()):>10.2f}"
        f"{sum(s['tasks'] for s in results[w]['stages'].values()):>10.2f}"
        f"{results[w]['wall']:>10.2f}{results[w].get('cpu', float('nan')):>10.2f}" for w in ws)
          + "   (total span = reduce_visit wall time; before/after = its time before the first "
          "task started and after the last ended: validation pass, plan, imports, notebook page; "
          "total cpu = the reducing process and its reaped children)")
    print(f"\n{'':<26}" + "".join(f"{f'{w} worker(s)':>14}" for w in ws))
    print(f"{'Luigi tasks run':<26}" + "".join(
        f"{sum(s['n'] for s in results[w]['stages'].values()):>14d}" for w in ws))
    print(f"{'peak RSS, reducing (MB)':<26}" + "".join(
        f"{results[w]['maxrss_self_kb'] / 1024:>14.1f}" for w in ws))
    print(f"{'peak RSS, child (MB)':<26}" + "".join(
        f"{results[w]['maxrss_children_kb'] / 1024:>14.1f}" for w in ws))
    if len(ws) > 1:
        a, b = ws[0], ws[-1]
        print(f"\nwall time {a} worker(s) / {b} worker(s) = {results[a]['wall'] / results[b]['wall']:.2f}"
              f"  (os.cpu_count() = {os.cpu_count()})")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--scenario", default="scan-transit",
                    help="scenario to render (scan-transit, stare-eclipse, ...)")
    ap.add_argument("--exposures", type=int, default=48, help="exposures of the visit")
    ap.add_argument("--workers", type=int, nargs="+", default=[1, 2], help="worker counts to compare")
    ap.add_argument("--repeat", type=int, default=2,
                    help="reductions per worker count, alternating; the fastest is shown")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    ap.add_argument("--events", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        child(args.child, args.workers[0], args.events)
        return 0

    from lightledger.synthetic_data.render import render

    with tempfile.TemporaryDirectory(prefix="lightledger-bench-") as tmp:
        t0 = time.perf_counter()
        base = render(args.scenario, Path(tmp) / "visit", seed=0, n_exposures=args.exposures)
        print(f"rendered {args.exposures} exposures of {args.scenario} in "
              f"{time.perf_counter() - t0:.1f} s")
        results = {}
        for rep in range(args.repeat):
            for w in args.workers:          # worker counts alternate: load elsewhere hits both
                folder = Path(tmp) / f"visit-{w}w-{rep}"
                shutil.copytree(base.parent, folder)
                res = run_one(folder / base.name, w, tmp, rep)
                if w not in results or res["wall"] < results[w]["wall"]:
                    results[w] = res
        print_table(results, args.exposures, args.repeat, args.scenario)
    return 0


if __name__ == "__main__":
    sys.exit(main())
