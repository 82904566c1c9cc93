"""The ``lightledger`` command line.

``lightledger reduce VISIT.toml``
    run the chain of stages on Luigi's local scheduler (or a central one with
    ``--scheduler-host``) and print the final light-curve product's path last;
``lightledger check VISIT.toml``
    the validation pass alone: every problem of the visit at once;
``lightledger simulate SCENARIO OUTDIR``
    render a fictional visit with known truth;
``lightledger demo [DIR]``
    render a small scan visit, reduce it and compare with the truth;
``lightledger audit PATH``
    verify checksums and lineage of one product or a whole notebook;
``lightledger compare A B``
    differences between two entries or two products;
``lightledger notebook list|prune|page PATH``
    the entries of a notebook, housekeeping, the page written again.

A user's mistake (a missing file, a bad key, a malformed product) prints one
line ``lightledger: error: FILE: what is wrong`` per problem on standard error
and exits with status 2, whether it is found before the run or inside a stage;
a failure of the machine (disk full, file-size limit, permission denied)
prints one such line and exits with status 3; anything else (a bug) says so,
prints its traceback and exits with status 1.
"""

import argparse
import os
import sys

#: Variables that set the thread count of the BLAS and OpenMP libraries under numpy.
BLAS_THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS",
                         "BLIS_NUM_THREADS", "VECLIB_MAXIMUM_THREADS")


def one_blas_thread(environ=os.environ):
    """Ask the BLAS for one thread per process unless the user set a thread count.

    Parallelism comes from Luigi's worker processes (``--workers``); a
    threaded BLAS inside each of them only competes for the same cores and
    stalls when another process is busy.  Must run before numpy is imported
    (the command line does it first thing); setting any of
    :data:`BLAS_THREAD_VARIABLES` yourself keeps your choice.  Returns True
    when it set them.
    """
    if any(name in environ for name in BLAS_THREAD_VARIABLES):
        return False
    for name in BLAS_THREAD_VARIABLES:
        environ[name] = "1"
    return True


one_blas_thread()

from lightledger.pipeline import __version__  # noqa: E402  (after the BLAS threads are set)
from lightledger.pipeline.errors import LightledgerError  # noqa: E402
from lightledger.pipeline.parameters import STAGE_ORDER  # noqa: E402

__all__ = ["main"]


#: The progress display of the running command (closed before any final message).
_DISPLAY = []


def Progress(stream=None):
    """The command's progress display (:class:`lightledger.tasks.console.Progress`)."""
    from .console import Progress as _Progress

    display = _Progress(stream)
    _DISPLAY.append(display)
    return display


def _close_progress():
    for display in _DISPLAY:
        display.close()


def _parser():
    parser = argparse.ArgumentParser(
        prog="lightledger",
        description="Reduce time-series spectroscopy of transiting planets into light curves.")
    parser.add_argument("--version", action="version", version=f"lightledger {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    red = sub.add_parser("reduce", help="reduce a visit (or a programme of visits) described by a TOML file")
    red.add_argument("visit", help="visit description, or programme description, (TOML)")
    red.add_argument("--workers", type=int, default=1, metavar="N",
                     help="run up to N Luigi tasks at once, in N processes (default: 1)")
    red.add_argument("--set", dest="settings", action="append", default=[], metavar="STAGE.KEY=VALUE",
                     help="override one stage parameter, checked like the visit description; "
                          "repeatable ('lightledger params' lists them; default: none)")
    red.add_argument("--until", choices=STAGE_ORDER, metavar="STAGE",
                     help="stop after this stage: " + ", ".join(STAGE_ORDER)
                          + " (default: run every stage)")
    red.add_argument("--force", choices=(*STAGE_ORDER, "joint"), action="append", default=[],
                     metavar="STAGE",
                     help="run this stage and the ones after it again although complete, keeping "
                          "the old entries renamed ...superseded-TIME; repeatable; 'joint' (a "
                          "programme) makes only its joint fit again (default: none)")
    red.add_argument("--scheduler-host", default=None, metavar="HOST",
                     help="use Luigi's central scheduler (luigid) on HOST instead of a local one "
                          "(default: a local scheduler)")
    red.add_argument("--scheduler-port", type=int, default=8082, metavar="PORT",
                     help="port of the central scheduler given by --scheduler-host (default: 8082)")

    chk = sub.add_parser("check", help="check a visit (description, profile, raw and reference "
                                       "files, parameters) and list every problem at once")
    chk.add_argument("visit", help="visit description (TOML)")
    chk.add_argument("--set", dest="settings", action="append", default=[], metavar="STAGE.KEY=VALUE",
                     help="check with this stage parameter overridden; repeatable (default: none)")
    chk.add_argument("--until", choices=STAGE_ORDER, metavar="STAGE",
                     help="check for a reduction that stops after this stage: "
                          + ", ".join(STAGE_ORDER) + " (default: every stage)")
    chk.add_argument("--headers-only", action="store_true",
                     help="read headers only (skip reading every exposure's reads)")

    sim = sub.add_parser("simulate", help="render a fictional visit with known truth",
                         description="Render a fictional visit with known truth; the same seed "
                                     "gives the same files.",
                         epilog="sizes each scenario accepts:\n  " + "\n  ".join(_size_limits()),
                         formatter_class=argparse.RawDescriptionHelpFormatter)
    sim.add_argument("scenario", nargs="?", help="scenario name (see --list)")
    sim.add_argument("outdir", nargs="?", help="directory to write the visit into")
    sim.add_argument("--seed", type=int, default=0, metavar="N",
                     help="seed of every random draw; the same seed gives the same files "
                          "(default: 0)")
    sim.add_argument("--exposures", type=int, default=None,
                     help="number of exposures (ranges below; default the scenario's)")
    sim.add_argument("--orbits", type=int, default=None,
                     help="orbits of a scan scenario (ranges below; default the scenario's)")
    sim.add_argument("--ramps", choices=("exponential", "traps"), default="exponential",
                     help="render the orbit ramps as exponentials (default) or by charge trapping "
                          "(scan scenarios: two trap populations, a ramp that differs per channel)")
    sim.add_argument("--list", action="store_true", help="list the scenarios and exit")

    demo = sub.add_parser("demo", help="render a small scan visit, reduce it, compare with the truth",
                          description="Render the scan-transit scenario into DIR, reduce it and "
                                      "compare the result with the truth it was rendered from.")
    demo.add_argument("dir", nargs="?", default="lightledger-demo", metavar="DIR",
                      help="directory for the visit and its notebook (default: lightledger-demo)")
    demo.add_argument("--exposures", type=int, default=60, metavar="N",
                      help="exposures of the visit, spread over its orbits: {} to {} "
                           "(default: 60)".format(*_demo_exposure_range()))
    demo.add_argument("--seed", type=int, default=1, metavar="N",
                      help="seed of the rendering (default: 1)")
    demo.add_argument("--workers", type=int, default=2, metavar="N",
                      help="Luigi worker processes of the reduction (default: 2)")

    sub.add_parser("params", help="list every stage parameter with its default and meaning")

    aud = sub.add_parser("audit", help="verify checksums and lineage of products")
    aud.add_argument("path", help="a product, a stage folder, a notebook folder or a visit TOML")

    cmp_ = sub.add_parser("compare", help="differences between two entries or two products")
    cmp_.add_argument("a", metavar="A",
                      help="a stage folder (NOTEBOOK/STAGE-IDENT) or a product file (FITS or ECSV)")
    cmp_.add_argument("b", metavar="B", help="the folder or product to compare A with (same kind)")

    nb = sub.add_parser("notebook", help="list, prune or rewrite the page of a notebook")
    nb_sub = nb.add_subparsers(dest="action", required=True, metavar="ACTION",
                               help="list, prune or page")
    nb_list = nb_sub.add_parser("list", help="every entry: stage, when, identity, size, state, "
                                             "what it was made from")
    nb_list.add_argument("path", help="a notebook folder, a visit TOML or a stage folder")
    nb_prune = nb_sub.add_parser("prune", help="remove superseded entries and older ones that "
                                               "nothing current depends on (current: the newest "
                                               "entry of each stage, the current chain, what a "
                                               "programme's joint fit reads), and folders of "
                                               "interrupted runs")
    nb_prune.add_argument("path", help="a notebook folder, a visit or programme TOML")
    nb_prune.add_argument("--dry-run", action="store_true", help="only show what would go")
    nb_page = nb_sub.add_parser("page", help="write index.html and notebook.json from the entries")
    nb_page.add_argument("path", help="a notebook folder or a visit TOML")
    return parser


def _demo_exposure_range():
    from lightledger.synthetic_data.scenarios import get_scenario
    from lightledger.synthetic_data.sizes import exposure_range

    return exposure_range(get_scenario("scan-transit"))     # tasks/demo.py's DEMO_SCENARIO


def _size_limits():
    from lightledger.synthetic_data.scenarios import SCENARIOS, get_scenario
    from lightledger.synthetic_data.sizes import describe_limits

    return describe_limits(get_scenario(name) for name in SCENARIOS)


def main(argv=None):
    """Entry point of the ``lightledger`` console script."""
    args = _parser().parse_args(argv)
    try:
        return _COMMANDS[args.command](args)
    except BrokenPipeError:   # output piped into a program that stopped reading (head, less)
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    except KeyboardInterrupt:
        _close_progress()
        print("lightledger: interrupted; complete products are kept, partial ones were not written",
              file=sys.stderr)
        return 130
    except Exception as exc:   # noqa: BLE001  every exception gets a status and its own words
        from .problems import describe_failure

        status, text = describe_failure(exc)
        _close_progress()
        print(text, file=sys.stderr)
        return status


def _cmd_reduce(args):
    from .programme import is_programme, reduce_programme
    from .run import reduce_visit

    # a programme description ([programme]) reduces each of its visits and fits them jointly
    reduce = reduce_programme if is_programme(args.visit) else reduce_visit
    result = reduce(args.visit, settings=args.settings, workers=args.workers, until=args.until,
                    force=args.force, progress=Progress(),
                    scheduler=(args.scheduler_host, args.scheduler_port)
                    if args.scheduler_host else None,
                    warn=lambda line: (_close_progress(), print(line, file=sys.stderr)))
    _close_progress()
    for line in result.messages:
        print(line, file=sys.stderr)
    for line in result.flags:                  # results that cannot be trusted
        print(line, file=sys.stderr)
    if result.set_aside:
        print(f"set aside: {len(result.set_aside)} exposures (listed in the calibrate stage's "
              f"inventory.ecsv):", file=sys.stderr)
        for line in result.set_aside:
            print(f"  {line}", file=sys.stderr)
    if not result.ok:
        # a user's mistake found inside a stage (e.g. channels outside the spectrum) exits like
        # one found before the run (2); a full disk or a file-size limit exits with 3; a failure
        # of the code itself with 1
        return result.status
    if result.ran:
        counts = {}
        for family in result.ran:
            counts[family] = counts.get(family, 0) + 1
        print("ran: " + ", ".join(f"{n} {f}" for f, n in counts.items()), file=sys.stderr)
    else:
        print("nothing to run: every product is already complete", file=sys.stderr)
    for line in result.notes:
        print(f"lightledger: note: {line}", file=sys.stderr)
    print(f"notebook page: {result.page}", file=sys.stderr)
    for line in result.headlines:
        print(line)
    print(result.final)
    return 0


def _cmd_check(args):
    from .check import check_visit

    progress = Progress()
    report = check_visit(args.visit, args.settings, until=args.until, read_data=not args.headers_only,
                         progress=lambda done, total: progress("check", "exposures read", done,
                                                               total))
    for line in report.lines():
        print(line, file=sys.stderr)
    for ref in report.set_aside:
        print(f"set aside: {ref.label}: {ref.reason}")
    n_err = len(report.errors)
    print(f"{report.visit.path if report.visit else args.visit}: {report.summary()}; "
          f"{n_err} errors, {len(report.warnings)} warnings")
    if not n_err:
        return 0
    return 3 if all(p.level == "environment" for p in report.errors) else 2


def _cmd_simulate(args):
    from lightledger.synthetic_data.render import render
    from lightledger.synthetic_data.scenarios import SCENARIOS

    if args.list or not args.scenario:
        for name, text in SCENARIOS.items():
            print(f"{name:<16} {text}")
        return 0
    if not args.outdir:
        raise LightledgerError("simulate: give an output directory: lightledger simulate SCENARIO OUTDIR")
    progress = Progress()
    visit = render(args.scenario, args.outdir, seed=args.seed, n_exposures=args.exposures,
                   n_orbits=args.orbits, ramps=args.ramps,
                   progress=lambda done, total: progress("simulate", "exposures", done, total))
    print(visit)
    return 0


def _cmd_demo(args):
    from .demo import run_demo

    return run_demo(args.dir, n_exposures=args.exposures, seed=args.seed, workers=args.workers,
                    progress=Progress())


def _cmd_params(args):
    from lightledger.pipeline.parameters import STAGES

    for spec in STAGES.values():
        print(f"[stages.{spec.name}]  {spec.doc} (code version {spec.version})")
        for p in spec.params:
            if isinstance(p.default, tuple):
                default = "[" + ", ".join(f'"{v}"' if isinstance(v, str) else str(v)
                                          for v in p.default) + "]"
            else:
                default = str(p.default).lower() if isinstance(p.default, bool) else p.default
            choices = f"  one of: {', '.join(p.choices)}" if p.choices else ""
            print(f"  {p.name} = {default}\n      {p.doc}{choices}")
        print()
    return 0


def _cmd_audit(args):
    from .audit import audit

    report = audit(args.path)
    for line in report.lines:
        print(line)
    for note in report.notes:
        print(f"note: {note}")
    for problem in report.problems:
        print(f"problem: {problem}", file=sys.stderr)
    print(f"{report.n_entries} entries and {report.n_products} products checked, "
          f"{len(report.problems)} problems")
    return 1 if report.problems else 0


def _cmd_notebook(args):
    from . import notebook

    if args.action == "list":
        folder, rows = notebook.list_entries(args.path)
        print(f"{folder}: {len(rows)} entries, oldest first")
        width = max([len(r.folder) for r in rows] + [6])
        print(f"{'folder':<{width}} {'stage':<10} {'created':<26} {'size':>9}  {'state':<12} made from")
        for r in rows:
            state = r.state + (" *" if r.in_chain else "")
            print(f"{r.folder:<{width}} {r.stage:<10} {r.created or '-':<26} {_bytes(r.size):>9}  "
                  f"{state:<12} {r.made_from or '-'}")
        print("* the current chain")
        return 0
    if args.action == "prune":
        reasons = {}
        folder, removed, freed = notebook.prune(args.path, dry_run=args.dry_run, reasons=reasons)
        verb = "would remove" if args.dry_run else "removed"
        for name in removed:
            print(f"{verb} {name}: {reasons.get(name, '')}")
        print(f"{folder}: {verb} {len(removed)} folders, {_bytes(freed)}")
        return 0
    page = notebook.write_page(notebook._notebook_of(args.path))
    print(page)
    return 0


def _bytes(n):
    for unit in ("B", "kB", "MB", "GB"):
        if n < 1000 or unit == "GB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000
    return f"{n:.1f} TB"


def _cmd_compare(args):
    from .compare import compare

    for line in compare(args.a, args.b):
        print(line)
    return 0


_COMMANDS = {"reduce": _cmd_reduce, "check": _cmd_check, "simulate": _cmd_simulate, "demo": _cmd_demo,
             "params": _cmd_params, "audit": _cmd_audit, "compare": _cmd_compare,
             "notebook": _cmd_notebook}


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
