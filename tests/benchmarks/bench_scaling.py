"""How the whole reduction scales with the visit: stares of ~100 to 10,000 exposures, scans of 5 to 30 orbits.

Run on demand (pytest does not collect ``bench_*.py``)::

    python tests/benchmarks/bench_scaling.py [--stare 100 1000 10000] [--orbits 5 15 30]
                                             [--per-orbit 32] [--repeat 2] [--cache DIR]

Every visit is rendered once by the forward model (``--cache DIR`` keeps the
renders for the next run; rendering is not timed).  For each size the script
then measures, side by side and ``--repeat`` times each (the fastest kept,
since other processes only ever add time):

* ``read s``: reading every raw READS array once into float32 (each file
  opened once, from the page cache: a warm read, the I/O floor);
* ``reduce s``: ``lightledger.tasks.run.reduce_visit`` with one worker on a
  fresh copy of the visit, in a fresh Python process (imports included);
* ``2w s``: the same with two workers;

and prints per size

* ``reduce/read``: reduce time over the read time (aim at most 10, stretch 5);
* ``per exp``: reduce time per exposure relative to the smallest size of the
  same kind (aim within 1.2: linear);
* ``peak MB``: the largest resident memory of the one-worker run
  (``ru_maxrss`` of the reducing process);
* ``science``: the share of the one-worker run spent inside the science
  kernels, i.e. inside every ``lightledger.pipeline`` function a task module
  calls (timed by wrapping those names in the task modules, outermost call
  only);
* ``2w speed-up``: one-worker over two-worker wall time (aim at least 1.7 on
  two idle cores);
* ``chunks``: the share of the one-worker run spent in the chunk tasks
  (calibration and extraction, the part workers share), and ``2w bound``,
  Amdahl's bound for two workers on two idle cores, ``1 / (1 - chunks / 2)``;
* ``machine 2p``: processor time two busy processes got over what one got,
  measured for a few seconds just before the two-worker run: 2 on two idle
  cores, less on a shared machine; the two-worker speed-up cannot exceed it;
* ``cpu 1w s`` and ``cpu 2w/1w``: processor time (user + system, the
  reducing process and its children) of the one-worker run, and the
  two-worker run's over it.  Child processes count once they have been
  waited for, so the two-worker figure can undercount (Luigi may leave some
  task processes unreaped); read it as a lower bound.

The machine (cores, load average before and after) is printed with the
table: on a shared machine compare the ratios, not the seconds.
"""

import argparse
import functools
import json
import os
import platform
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def _wrap_kernels(totals):
    """Time every lightledger.pipeline function called from a task module (outermost only)."""
    import importlib
    import inspect
    import pkgutil

    import lightledger.tasks as tasks_pkg

    depth = [0]

    def wrap(fn):
        @functools.wraps(fn)
        def timed(*args, **kwargs):
            if depth[0]:
                return fn(*args, **kwargs)
            depth[0] += 1
            t0 = time.perf_counter()
            try:
                return fn(*args, **kwargs)
            finally:
                totals["kernels"] += time.perf_counter() - t0
                depth[0] -= 1
        return timed

    for info in pkgutil.iter_modules(tasks_pkg.__path__):
        module = importlib.import_module(f"lightledger.tasks.{info.name}")
        for name, value in list(vars(module).items()):
            if inspect.isfunction(value) and value.__module__.startswith("lightledger.pipeline"):
                setattr(module, name, wrap(value))
            elif inspect.ismodule(value) and value.__name__.startswith("lightledger.pipeline"):
                # module imported whole (e.g. ``from lightledger.pipeline import mask as dq``)
                for fname, fvalue in list(vars(value).items()):
                    if inspect.isfunction(fvalue) and fvalue.__module__ == value.__name__ \
                            and not fname.startswith("_"):
                        setattr(value, fname, wrap(fvalue))


def child(visit_path, workers, kernels):
    """Reduce one visit in this process, as the command line does; print one JSON line of results."""
    t_start = time.perf_counter()
    import lightledger.tasks.cli  # noqa: F401  (one BLAS thread per process, before numpy loads)
    totals = {"kernels": 0.0}
    if kernels:
        _wrap_kernels(totals)
    from lightledger.tasks.run import reduce_visit

    result = reduce_visit(visit_path, workers=workers)
    wall = time.perf_counter() - t_start
    chunk_seconds = 0.0
    for record in Path(visit_path).parent.glob("notebook/*/.*.made"):
        made = json.loads(record.read_text())
        if str(made.get("task", "")).endswith("Chunk"):
            chunk_seconds += float(made.get("seconds", 0.0))
    me, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime
    print(json.dumps({"ok": result.ok, "messages": result.messages, "wall": wall,
                      "kernels": totals["kernels"], "cpu": cpu, "chunk_seconds": chunk_seconds,
                      "rss_self_kb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss,
                      "rss_children_kb": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss}))


def read_floor(raw_dir):
    """Seconds to read every READS array once into float32, each file opened once."""
    import numpy as np
    from astropy.io import fits

    t0 = time.perf_counter()
    total = 0
    for path in sorted(Path(raw_dir).glob("*.fits")):
        with fits.open(path, memmap=False) as hdul:
            total += np.asarray(hdul["READS"].data, dtype=np.float32).size
    return time.perf_counter() - t0, total


def _spin(seconds):
    """Processor seconds a pure-Python loop gets in ``seconds`` of wall time."""
    t0, c0 = time.monotonic(), time.process_time()
    while time.monotonic() - t0 < seconds:
        sum(range(10000))
    return time.process_time() - c0


def machine_gain(seconds=3.0):
    """Processor time two busy processes get over what one gets, in the same wall time, now.

    On idle cores this is 2 for two cores; on a shared machine it says what a
    second worker can gain at best, whatever the reducer does.
    """
    import multiprocessing

    ctx = multiprocessing.get_context("fork")
    one = _spin(seconds)
    queue = ctx.SimpleQueue()
    procs = [ctx.Process(target=lambda: queue.put(_spin(seconds))) for _ in range(2)]
    for proc in procs:
        proc.start()
    two = queue.get() + queue.get()
    for proc in procs:
        proc.join()
    return two / one if one > 0 else float("nan")


def reduce_once(base, workers, tmp, tag, kernels):
    folder = Path(tmp) / f"run-{tag}"
    if folder.exists():
        shutil.rmtree(folder)
    shutil.copytree(base, folder, ignore=shutil.ignore_patterns("notebook"))
    cmd = [sys.executable, __file__, "--child", str(folder / "visit.toml"), "--workers", str(workers)]
    if kernels:
        cmd.append("--kernels")
    proc = subprocess.run(cmd, capture_output=True, text=True)
    shutil.rmtree(folder, ignore_errors=True)
    if proc.returncode != 0:
        sys.stderr.write(proc.stderr[-4000:])
        raise SystemExit(f"bench_scaling: the reduction of {base} with {workers} worker(s) failed")
    res = json.loads(proc.stdout.strip().splitlines()[-1])
    if not res["ok"]:
        raise SystemExit("bench_scaling: the reduction did not complete: " + "; ".join(res["messages"]))
    return res


def render_cached(cache, scenario, n_exposures=None, n_orbits=None, seed=0):
    from lightledger.synthetic_data.render import render

    tag = f"{scenario}-e{n_exposures}-o{n_orbits}-s{seed}"
    folder = Path(cache) / tag
    if not (folder / "visit.toml").exists():
        t0 = time.perf_counter()
        render(scenario, folder, seed=seed, n_exposures=n_exposures, n_orbits=n_orbits)
        print(f"  rendered {tag} in {time.perf_counter() - t0:.0f} s", flush=True)
    return folder


def measure(folder, n_exposures, repeat, tmp, label):
    best = {}
    for rep in range(repeat):
        t, n_values = read_floor(folder / "raw")
        best["read"] = min(best.get("read", t), t)
        for workers in (1, 2):
            gain = machine_gain() if workers == 2 else None
            res = reduce_once(folder, workers, tmp, f"{label}-{workers}w-{rep}", kernels=workers == 1)
            key = f"{workers}w"
            if key not in best or res["wall"] < best[key]["wall"]:
                best[key] = res
                if gain is not None:
                    best["gain"] = gain
        print(f"  {label} repeat {rep + 1}: read {t:.2f} s, 1w {best['1w']['wall']:.1f} s, "
              f"2w {best['2w']['wall']:.1f} s (best so far)", flush=True)
    best["n"] = n_exposures
    best["n_values"] = n_values
    return best


def print_table(title, rows):
    print(f"\n{title}")
    head = (f"{'size':<22}{'exposures':>10}{'read s':>9}{'reduce s':>10}{'reduce/read':>13}"
            f"{'per exp':>9}{'peak MB':>9}{'science':>9}{'2w s':>8}{'2w speed-up':>13}"
            f"{'cpu 1w s':>10}{'cpu 2w/1w':>11}{'chunks':>8}{'2w bound':>10}{'machine 2p':>12}")
    print(head)
    print("-" * len(head))
    first = rows[0][1]
    per0 = first["1w"]["wall"] / first["n"]
    for label, r in rows:
        one, two = r["1w"], r["2w"]
        share = min(one.get("chunk_seconds", float("nan")) / one["wall"], 1.0)
        print(f"{label:<22}{r['n']:>10d}{r['read']:>9.2f}{one['wall']:>10.1f}"
              f"{one['wall'] / r['read']:>13.1f}{one['wall'] / r['n'] / per0:>9.2f}"
              f"{one['rss_self_kb'] / 1024:>9.0f}{one['kernels'] / one['wall']:>9.0%}"
              f"{two['wall']:>8.1f}{one['wall'] / two['wall']:>13.2f}"
              f"{one.get('cpu', float('nan')):>10.1f}"
              f"{two.get('cpu', float('nan')) / one.get('cpu', float('nan')):>11.2f}"
              f"{share:>8.0%}{1.0 / (1.0 - share / 2.0):>10.2f}{r.get('gain', float('nan')):>12.2f}")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--stare", type=int, nargs="*", default=[100, 1000, 10000],
                    help="exposures of each stare visit (stare-eclipse)")
    ap.add_argument("--orbits", type=int, nargs="*", default=[5, 15, 30],
                    help="orbits of each scan visit (scan-transit)")
    ap.add_argument("--per-orbit", type=int, default=32, help="scan exposures per orbit")
    ap.add_argument("--repeat", type=int, default=2, help="runs of each measurement; fastest kept")
    ap.add_argument("--cache", help="keep rendered visits here between runs (default: a temporary folder)")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    ap.add_argument("--workers", type=int, default=1, help=argparse.SUPPRESS)
    ap.add_argument("--kernels", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        child(args.child, args.workers, args.kernels)
        return 0

    load0 = os.getloadavg()
    started = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="lightledger-scaling-") as tmp:
        cache = Path(args.cache) if args.cache else Path(tmp) / "renders"
        cache.mkdir(parents=True, exist_ok=True)
        stare_rows, scan_rows = [], []
        for n in args.stare:
            folder = render_cached(cache, "stare-eclipse", n_exposures=n)
            stare_rows.append((f"stare {n}", measure(folder, n, args.repeat, tmp, f"stare{n}")))
            print_table("stare-eclipse (so far)", stare_rows)
        for k in args.orbits:
            n = k * args.per_orbit
            folder = render_cached(cache, "scan-transit", n_exposures=n, n_orbits=k)
            scan_rows.append((f"scan {k} orbits", measure(folder, n, args.repeat, tmp, f"scan{k}")))
            print_table(f"scan-transit ({args.per_orbit} exposures per orbit, so far)", scan_rows)
    load1 = os.getloadavg()
    print(f"\nbench_scaling: fastest of {args.repeat} runs each; machine: {platform.machine()}, "
          f"{os.cpu_count()} cores, {platform.python_implementation()} {platform.python_version()}, "
          f"load average {load0[0]:.1f}/{load0[1]:.1f} before and {load1[0]:.1f}/{load1[1]:.1f} after "
          f"(1/5 min); {time.perf_counter() - started:.0f} s in all")
    if stare_rows:
        print_table("stare-eclipse", stare_rows)
    if scan_rows:
        print_table(f"scan-transit ({args.per_orbit} exposures per orbit)", scan_rows)
    print("\nread = every raw READS array read once into float32 (warm page cache); reduce = one "
          "worker, fresh process, imports included; per exp = reduce time per exposure over the "
          "smallest size's; peak MB = ru_maxrss of the one-worker run; science = share of its time "
          "inside lightledger.pipeline functions called by the tasks; 2w speed-up = one-worker over "
          "two-worker wall time; cpu = user + system seconds of the reducing process and its children; "
          "chunks = share of the one-worker run in chunk tasks (the part workers share); 2w bound = "
          "Amdahl's bound on two idle cores, 1 / (1 - chunks / 2); machine 2p = processor time two "
          "busy processes got over what one got just before the two-worker run (2 on two idle "
          "cores; less when other work shares the machine).")
    return 0


if __name__ == "__main__":
    sys.exit(main())
