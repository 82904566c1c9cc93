"""Programmes of visits: one planet, several visits, one joint fit.

A programme description (TOML) lists visit descriptions and the planet they
share::

    [programme]
    name = "..."
    visits = ["visit-a/visit.toml", "visit-b/visit.toml"]
    notebook = "notebook"        # optional, beside the programme file

    [planet]
    t0 = ...  period = ...  rp_rs = ...  a_rs = ...  inclination = ...
    u1 = ...  u2 = ...  eccentricity = ...  omega = ...     # optional

    [stages.joint]               # optional, see `lightledger params`
    phase_bins = [0.0, 0.25, 0.5, 0.75, 1.0]

``lightledger reduce PROGRAMME.toml`` runs every visit's calibrate, extract
and bin stages as for a single visit (each in its visit's own notebook; one
Luigi build, so chunks of every visit run in parallel across workers and
machines) and then :class:`JointDetrend`: each visit's own systematics
(chosen by its ``[stages.detrend]``), one planet per channel fitted jointly
(:func:`lightledger.pipeline.programme.fit_programme`), and each visit fitted
alone for comparison.  The joint entry lives in the programme's notebook as
``joint-IDENT/``, where IDENT hashes the joint stage's version and
parameters, the planet, and every visit's ``bin`` identity and systematics
choices: a tweak to one visit re-runs that visit's later stages and the joint
fit, nothing else.  The programme page (``programme.html``) links every
visit's page and shows the joint fit beside each visit's own.
"""

import json
import logging
import os
import shutil
import socket
import time
import tomllib
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import luigi
import numpy as np

from lightledger.pipeline import __version__
from lightledger.pipeline.errors import ConfigError, LightledgerError, ParameterError
from lightledger.pipeline.orbit import Ephemeris
from lightledger.pipeline.parameters import STAGE_ORDER, STAGES, resolve

from .base import (ENTRY_NAME, PROGRESS, FolderTask, content_identity, product_digest,
                   read_entry, settings_from_text, settings_to_text, stage_params, user_name,
                   visit_config)
from .config import Key, check_schema, read_toml
from .problems import Problems
from .products import Provenance, relative_input, write_json
from .programmepage import write_programme_page

__all__ = ["PROGRAMME_SCHEMA", "Programme", "load_programme", "is_programme", "JointDetrend",
           "ProgrammeResult", "reduce_programme", "joint_dir", "joint_identity", "joint_facts",
           "joint_params", "joint_members", "write_programme_page"]

PROGRAMME_SCHEMA = {
    "programme": {
        "name": Key("str", "name of the programme (free text)"),
        "notebook": Key("path", "directory of the programme's notebook (default notebook/ "
                                "beside the programme file)", required=False),
    },
    "planet": {
        "name": Key("str", "name of the planet (free text)", required=False),
        "t0": Key("float", "BJD_TDB of a mid-transit"),
        "period": Key("float", "orbital period, days"),
        "rp_rs": Key("float", "a priori planet-to-star radius ratio"),
        "a_rs": Key("float", "semi-major axis in stellar radii"),
        "inclination": Key("float", "orbital inclination, degrees"),
        "u1": Key("float", "quadratic limb darkening u1 (default 0)", required=False),
        "u2": Key("float", "quadratic limb darkening u2 (default 0)", required=False),
        "eccentricity": Key("float", "orbital eccentricity (default 0)", required=False),
        "omega": Key("float", "argument of periastron, degrees (default 90)", required=False),
    },
    "stages": Key("map", "settings of the joint stage: [stages.joint]", required=False,
                  allowed_keys=("joint",)),
}


@dataclass(frozen=True)
class Programme:
    """A validated programme description."""

    path: Path
    name: str
    notebook: Path
    visits: tuple           # absolute paths of the visit descriptions
    planet: dict
    params: dict            # the joint stage's parameters
    overrides: dict


def is_programme(path):
    """True when the TOML file at ``path`` is a programme description ([programme])."""
    try:
        with open(path, "rb") as fh:
            return "programme" in tomllib.load(fh)
    except (OSError, tomllib.TOMLDecodeError):
        return False


def load_programme(path, settings=None):
    """Read and validate a programme description and every visit it lists.

    Parameters
    ----------
    path : str or Path
    settings : list of (stage, key, value), optional
        ``--set`` overrides; ``joint.*`` ones apply to the joint stage (the
        others reach every visit when its description is loaded).

    Returns
    -------
    Programme

    Raises
    ------
    ConfigError
        Every problem of the description, one line each naming the file and
        the key (or the visit).
    """
    path = Path(path).resolve()
    problems = Problems()
    doc = read_toml(path, "programme description", problems)
    problems.raise_errors(ConfigError)
    doc = dict(doc)
    table = doc.get("programme")
    visits = None
    if isinstance(table, dict):
        table = dict(table)
        visits = table.pop("visits", None)
        doc["programme"] = table
    doc = check_schema(doc, PROGRAMME_SCHEMA, path, problems)
    files = []
    if not isinstance(visits, list) or not visits or not all(isinstance(v, str) and v
                                                             for v in visits):
        problems.error(path, "programme.visits must be a non-empty list of visit description "
                             "paths")
        visits = []
    for rel in visits:
        file = (path.parent / rel).resolve()
        if not file.is_file():
            problems.error(path, f"programme.visits names {rel}, which does not exist")
        elif file in files:
            problems.error(path, f"programme.visits lists {rel} twice")
        else:
            files.append(file)
    planet = dict(doc.get("planet") or {})
    for key, default in (("u1", 0.0), ("u2", 0.0), ("eccentricity", 0.0), ("omega", 90.0)):
        planet[key] = default if planet.get(key) is None else planet[key]
    if all(planet.get(k) is not None for k in ("t0", "period", "a_rs", "inclination", "rp_rs")):
        try:
            Ephemeris(planet["t0"], planet["period"], planet["a_rs"], planet["inclination"],
                      planet["eccentricity"], planet["omega"])
            if planet["rp_rs"] <= 0:
                raise ParameterError(f"rp_rs must be > 0; got {planet['rp_rs']}")
        except ParameterError as exc:
            problems.error(path, f"planet.{exc}")
    overrides = dict((doc.get("stages") or {}).get("joint", {}) or {})
    for stage, key, value in settings or ():
        if stage == "joint":
            overrides[key] = value
    params = None
    try:
        params = resolve("joint", overrides, where=str(path))
        edges = np.asarray(params["phase_bins"], float)
        if edges.size < 2 or np.any(np.diff(edges) <= 0):
            problems.error(path, "stages.joint.phase_bins must be at least two increasing "
                                 "phases within [0, 1]")
    except ParameterError as exc:
        problems.error(path, str(exc))
    problems.raise_errors(ConfigError)
    visit_text = settings_to_text([s for s in settings or () if s[0] != "joint"])
    for file in files:
        visit_config(file, visit_text)       # each visit's own problems, one error
    notebook = doc["programme"]["notebook"] or path.parent / "notebook"
    return Programme(path=path, name=doc["programme"]["name"], notebook=Path(notebook),
                     visits=tuple(files), planet=planet, params=params,
                     overrides={"joint": overrides})


def _split_settings(settings_text):
    settings = settings_from_text(settings_text)
    visit_text = settings_to_text([s for s in settings if s[0] != "joint"])
    return settings, visit_text


def _json_ready(value):
    return list(value) if isinstance(value, tuple) else value


def joint_params(programme):
    """The joint stage's resolved parameters as a sorted list of [name, value] (JSON-ready)."""
    return sorted((k, _json_ready(v)) for k, v in programme.params.items())


def joint_facts(programme, visit_text="[]"):
    """What the joint stage uses besides its parameters and the visits' light curves.

    The programme's name, the planet, and each visit's name and detrend
    parameters (its systematics models), in the programme's order; part of the
    joint identity, recorded in the entry so that ``audit`` can recompute it.
    """
    visits = []
    for file in programme.visits:
        visit = visit_config(file, visit_text)
        visits.append([visit.name, stage_params(visit, "detrend")])
    return [["programme", programme.name],
            ["planet", sorted([k, _json_ready(v)] for k, v in programme.planet.items())],
            ["visits", visits]]


def joint_identity(programme, visit_text, bin_identities):
    """Identity hash (hex) of the programme's joint stage.

    Over the joint stage's version and parameters, :func:`joint_facts`, and
    every visit's ``bin`` identity (the upstream, joined by colons), as a
    visit's stage identity is (:func:`lightledger.tasks.base.content_identity`).
    """
    return content_identity("joint", joint_params(programme), joint_facts(programme, visit_text),
                            ":".join(bin_identities))


def joint_dir(programme, visit_text, bin_identities):
    """``NOTEBOOK/joint-IDENT`` folder of a programme."""
    return programme.notebook / f"joint-{joint_identity(programme, visit_text, bin_identities)[:10]}"


def _kind(lc):
    """'stare' when no usable exposure of a light-curve table was scanned, else 'scan'."""
    from .lightcurves import usable_rows

    direction = np.asarray(lc["scan_direction"])[usable_rows(lc)]
    return "stare" if bool(np.all(direction == 0)) else "scan"


def joint_members(params, kinds):
    """The joint fit's grid: ``([(label, [model string per visit]), ...], warnings)``.

    Every member fits each visit with the same model string, so the grid
    costs one joint fit per model (not one per combination of the visits'
    models).  ``joint.models`` names them; empty, the default phase-curve grid
    of the visits' kind (scans or stares); a programme of scans and stares
    pairs the k-th model of each kind's grid.  Common-mode models are left out
    (a joint fit divides no white light out of its channels), with a warning.

    Parameters
    ----------
    params : dict
        The joint stage's parameters.
    kinds : list of {"scan", "stare"}
        Each visit's kind.
    """
    from lightledger.pipeline.modelspec import (DEFAULT_PHASE_SCAN_GRID,
                                                DEFAULT_PHASE_STARE_GRID, parse_grid)

    defaults = {"scan": DEFAULT_PHASE_SCAN_GRID, "stare": DEFAULT_PHASE_STARE_GRID}
    if params["models"]:
        grids = {k: tuple(params["models"]) for k in defaults}
    else:
        grids = defaults
    kept, dropped = {}, []
    for kind, texts in grids.items():
        specs = parse_grid(texts)
        kept[kind] = [s.name for s in specs if not s.common_mode]
        dropped += [s.name for s in specs if s.common_mode and s.name not in dropped]
    warnings = ([f"joint.models: common-mode models are not fitted jointly (no white light is "
                 f"divided out of a joint fit): {', '.join(dropped)}"] if dropped else [])
    size = min(len(kept[k]) for k in set(kinds))
    if size == 0:
        raise LightledgerError("joint.models: the joint fit needs at least one model without a "
                               "common-mode token (cm-sys, cm-res)")
    members = []
    for k in range(size):
        strings = [kept[kind][k] for kind in kinds]
        label = strings[0] if len(set(strings)) == 1 else " | ".join(strings)
        members.append((label, strings))
    return members, warnings


class JointDetrend(FolderTask, luigi.Task):
    """Fit every visit's systematics and one shared planet per channel.

    A notebook stage like the visits' (:class:`~lightledger.tasks.base.FolderTask`):
    it makes its folder under the folder's lock, moves a forced folder aside
    first, reuses what another reducer made meanwhile and leaves a
    made-record beside its entry.
    """

    programme = luigi.Parameter(description="path of the programme description (TOML)")
    settings = luigi.Parameter(default="[]",
                               description="JSON list of [stage, key, value] overrides (--set)")
    chains = luigi.Parameter(description="JSON list of each visit's bin-stage chain (identities)")
    force_from = luigi.Parameter(default="", description="first forced stage (--force), or empty")
    force_after = luigi.FloatParameter(default=0.0,
                                       description="forced stages older than this are made again")
    run_id = luigi.Parameter(default="", significant=False,
                             description="identifier of the reduction that scheduled this task")

    stage = "joint"

    @property
    def config(self):
        if "_config" not in self.__dict__:
            self.__dict__["_config"] = load_programme(self.programme,
                                                      settings_from_text(self.settings))
        return self.__dict__["_config"]

    @property
    def visit_text(self):
        return _split_settings(self.settings)[1]

    @property
    def bin_identities(self):
        return [c.split(":")[-1] for c in json.loads(self.chains)]

    @property
    def identity_hash(self):
        if "_ident" not in self.__dict__:
            self.__dict__["_ident"] = joint_identity(self.config, self.visit_text,
                                                     self.bin_identities)
        return self.__dict__["_ident"]

    @property
    def folder(self):
        return Path(self.config.notebook) / f"joint-{self.identity_hash[:10]}"

    @property
    def forced(self):
        return bool(self.force_from)

    def requires(self):
        from .lightcurves import Bin

        visit_force = self.force_from if self.force_from in STAGE_ORDER else ""
        return [Bin(visit=str(v), settings=self.visit_text, chain=c, force_from=visit_force,
                    force_after=self.force_after if visit_force else 0.0, run_id=self.run_id)
                for v, c in zip(self.config.visits, json.loads(self.chains))]

    def output(self):
        return luigi.LocalTarget(str(self.folder / ENTRY_NAME))

    def complete(self):
        """The entry exists and is valid (and, when forced, newer than the run's start)."""
        path = Path(self.output().path)
        try:
            st = os.stat(path)
        except FileNotFoundError:
            return False
        if self.forced and st.st_mtime < self.force_after:
            return False
        return read_entry(path, self.stage) is not None

    def final_product(self):
        return self.folder / "planet.fits"

    def progress(self, done, total, what):
        try:
            self.set_status_message(f"{what}: {done}/{total}")
            self.set_progress_percentage(round(100.0 * done / max(total, 1), 1))
        except Exception:  # no scheduler attached
            pass
        reporter = PROGRESS.get("callback")
        if reporter is not None:
            reporter(self.stage, what, done, total)

    def on_failure(self, exception):
        """Record the reason and exit status for the command line (as the visits' tasks do)."""
        from .problems import describe_failure

        status, text = describe_failure(exception, context=f"{self.programme} (joint stage)")
        try:
            folder = Path(self.config.notebook) / ".failures" / (self.run_id or "by-hand")
            folder.mkdir(parents=True, exist_ok=True)
            (folder / f"{self.task_id}.txt").write_text(f"{status}\n{text}\n", encoding="utf-8")
        except Exception:
            pass
        return super().on_failure(exception)

    def run(self):
        from lightledger.pipeline.phasegrid import fit_phase_grid
        from lightledger.pipeline.programme import fit_programme, quantity

        from .lightcurves import read_lightcurves
        from .phasecurve import planet_model, visit_curves, write_phase_products

        started = time.time()
        prog = self.config
        visits = [visit_config(v, self.visit_text) for v in prog.visits]
        inputs = [task.final_product() for task in self.requires()]
        self.folder.mkdir(parents=True, exist_ok=True)
        lcs, channels = [], None
        event = dict(prog.planet, kind="phase-curve")
        for visit, path in zip(visits, inputs):
            lc, ch = read_lightcurves(path)
            if channels is None:
                channels = ch
            elif len(ch) != len(channels) or not np.allclose(ch["wave_lo"], channels["wave_lo"]):
                raise LightledgerError(f"{visit.path}: its channels differ from those of "
                                       f"{visits[0].path}; give the visits the same "
                                       "[stages.bin] edges")
            lcs.append(lc)
        planet = planet_model(event, prog.params)
        members, warnings = joint_members(prog.params, [_kind(lc) for lc in lcs])
        n_curves = len(channels) + 1
        n_fits = n_curves * (len(members) + (len(visits) if len(visits) > 1 else 0))
        done = [0]

        def step(what):
            def report(d, total):
                self.progress(done[0] + d, n_fits, what)
            return report

        fits, failures, curves_of = [], [], []
        for label, strings in members:
            curves = [visit_curves(lc, event, dict(v.stages["detrend"], models=(m,)), v.name)
                      for lc, v, m in zip(lcs, visits, strings)]
            curves_of.append(curves)
            try:
                fits.append(fit_programme(curves, planet, progress=step(f"joint fit, {label}")))
            except (LightledgerError, np.linalg.LinAlgError) as exc:
                fits.append(None)
                failures.append(f"{label}: {exc}")
            done[0] += n_curves
        grid = fit_phase_grid(fits, [label for label, _ in members],
                              criterion=prog.params["criterion"], failures=failures)
        top = grid.top_fit()
        alone = None
        if len(visits) > 1:
            # each visit alone, with the white light's top-weighted model (for comparison)
            alone = []
            for c in curves_of[int(grid.best[0])]:
                alone.append(fit_programme([c], planet, progress=step(f"{c.name} alone")))
                done[0] += n_curves
        band = (float(lcs[0].meta.get("WLO", channels["wave_lo"][0])),
                float(lcs[0].meta.get("WHI", channels["wave_hi"][-1])))
        prov = Provenance("joint", STAGES["joint"].version, self.identity_hash[:10], prog.params,
                          {relative_input(p, self.folder): product_digest(p) for p in inputs},
                          visit=prog.name)
        outputs, figs, metrics = write_phase_products(
            self.folder, prov, top, lcs, channels, band, planet, prog.params,
            names=[v.name for v in visits], alone=alone, grid=grid)
        if alone is not None:
            errs = [quantity(a.white, "eclipse_depth")[1] for a in alone]
            metrics["white eclipse depth error, best visit alone (ppm)"] = (
                round(float(np.nanmin(errs)) * 1e6, 1) if np.any(np.isfinite(errs)) else None)
        warnings += [f"joint grid: model not fitted: {line}" for line in failures]
        self._write_entry(prog, inputs, outputs, metrics, figs, started, warnings=warnings)

    def _write_entry(self, prog, inputs, outputs, metrics, figs, started, warnings=()):
        """entry.json with the fields of a visit stage's entry (audit recomputes the identity)."""
        made_from = [relative_input(Path(p).parent, prog.notebook) for p in inputs]
        entry = {
            "stage": "joint",
            "identity": self.identity_hash[:10],
            "identity_hash": self.identity_hash,
            "upstream": ":".join(self.bin_identities),
            "folder": self.folder.name,
            "visit": prog.name,
            "visit_file": str(prog.path),
            "target": prog.planet.get("name") or "",
            "event": "phase-curve",
            "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
            "user": user_name(),
            "host": socket.gethostname(),
            "run": self.run_id,
            "software_version": __version__,
            "stage_version": STAGES["joint"].version,
            "seconds": round(time.time() - started, 2),
            "params": dict(joint_params(prog)),
            "facts": joint_facts(prog, self.visit_text),
            "overrides": prog.overrides.get("joint", {}),
            "made_from": ", ".join(made_from),
            "inputs": {relative_input(p, self.folder): product_digest(p) for p in inputs},
            "outputs": {Path(p).name: product_digest(p) for p in [*outputs, *figs]},
            "metrics": metrics,
            "not_applying": {},
            "figures": [Path(f).name for f in figs],
            "warnings": [str(w) for w in warnings],
        }
        write_json(self.output().path, entry)


# --------------------------------------------------------------------------
# Running a programme
# --------------------------------------------------------------------------

@dataclass
class ProgrammeResult:
    """What a programme's reduction did (the fields of a visit's RunResult, and the tasks)."""

    ok: bool
    final: Path | None
    page: Path | None
    ran: list = field(default_factory=list)        # task families that ran
    ran_tasks: list = field(default_factory=list)  # (family, visit or programme file)
    messages: list = field(default_factory=list)
    warnings: list = field(default_factory=list)
    set_aside: list = field(default_factory=list)
    status: int = 0
    flags: list = field(default_factory=list)      # lines: results that cannot be trusted
    notes: list = field(default_factory=list)
    headlines: list = field(default_factory=list)  # headline figures of the joint entry


def reduce_programme(path, *, settings=(), workers=1, until=None, force=(), progress=None,
                     scheduler=None, warn=None):
    """Reduce every visit of a programme and fit them jointly.

    Parameters
    ----------
    path : str or Path
        Programme description.
    settings : list of (stage, key, value) or of "STAGE.KEY=VALUE" texts
        ``--set`` overrides: ``joint.*`` for the joint stage, the others for
        every visit.
    workers : int
        Luigi workers.
    until : str, optional
        ``calibrate``, ``extract`` or ``bin`` to stop every visit there
        (``detrend`` or None: the joint fit).
    force : list of str
        Stages to make again in every visit (the joint fit is then made again
        too).
    progress : callable, optional
        ``progress(stage, what, done, total)``.
    scheduler : (host, port), optional
        A central ``luigid`` scheduler.
    warn : callable, optional
        ``warn(line)`` for each warning of the visits' validation passes.

    Returns
    -------
    ProgrammeResult

    Raises
    ------
    LightledgerError
        The programme description's problems, or every problem of the first
        visit that has any (:func:`lightledger.tasks.check.check_visit`),
        before any task runs.
    """
    import uuid

    from .base import make_plan, register_plan
    from .check import check_visit, parse_settings
    from .notebook import note_last_used, note_programme, write_page
    from .run import (check_force, exit_status, headlines, others_running, preload, ran_tasks,
                      stage_task, sweep)

    started = time.time()
    settings = parse_settings(settings)
    settings_text = settings_to_text(settings)
    prog = load_programme(path, settings)
    _, visit_text = _split_settings(settings_text)
    visit_settings = [s for s in settings if s[0] != "joint"]
    until = until or STAGE_ORDER[-1]
    if until not in STAGE_ORDER:
        raise LightledgerError(f"--until {until}: not a stage; stages are {', '.join(STAGE_ORDER)}")
    last = "bin" if until == "detrend" else until
    force_from = check_force(list(force or ()), until, extra=("joint",))
    if force_from == "joint" and until != "detrend":
        raise LightledgerError(f"--force joint with --until {until}: the run stops before the "
                               "joint fit, so it cannot make it again")
    if workers < 1:
        raise LightledgerError("--workers must be at least 1")
    plans, warnings_, set_aside = [], [], []
    for file in prog.visits:
        # each visit's validation pass up to bin: the joint fit replaces its detrend stage
        report = check_visit(file, visit_settings, until="bin",
                             progress=None if progress is None else
                             lambda d, t: progress("check", "exposures read", d, t))
        for problem in report.warnings:
            warnings_.append(problem.line)
            if warn is not None:
                warn(problem.line)
        report.raise_errors()
        visit = visit_config(file, visit_text)
        plans.append(register_plan(make_plan(visit, visit_text, report.usable,
                                             inventory=report.refs)))
        set_aside += [f"{r.label}: {r.reason}" for r in report.set_aside]
    run_id = uuid.uuid4().hex
    for plan in plans:
        Path(plan.visit.notebook).mkdir(parents=True, exist_ok=True)
        sweep(plan.visit.notebook)
    prog.notebook.mkdir(parents=True, exist_ok=True)
    sweep(prog.notebook)
    force_after = started if force_from else 0.0
    if until == "detrend":
        # the old folder of a forced joint stage is moved aside by the task, under its lock
        task = JointDetrend(programme=str(prog.path), settings=settings_text,
                            chains=json.dumps([p.chain("bin") for p in plans]),
                            force_from=force_from, force_after=force_after, run_id=run_id)
        for plan in plans:      # so that pruning a visit's notebook keeps what the fit reads
            note_programme(plan.visit.notebook, prog.notebook)
        tasks = [task]
    else:
        visit_force = force_from if force_from in STAGE_ORDER else ""
        tasks = [stage_task(last, p, force_from=visit_force,
                            force_after=force_after if visit_force else 0.0,
                            run_id=run_id) for p in plans]
    failure_dirs = [Path(p.visit.notebook) / ".failures" / run_id for p in plans] \
        + [prog.notebook / ".failures" / run_id]
    PROGRESS["callback"] = progress
    logging.getLogger("luigi-interface").setLevel(logging.CRITICAL)
    kwargs = dict(workers=workers, detailed_summary=True, log_level="CRITICAL")
    if scheduler:
        config = luigi.configuration.get_config()
        config.set("worker", "keep_alive", "true")
        config.set("worker", "wait_interval", "1.0")
        kwargs.update(scheduler_host=scheduler[0], scheduler_port=scheduler[1])
    else:
        kwargs.update(local_scheduler=True)
    if workers > 1 and not all(t.complete() for t in tasks):
        preload(plans[0].visit)
    try:
        summary = luigi.build(tasks, **kwargs)
        done = ran_tasks(summary)
        # with a central scheduler, wait for other machines' workers still making what the
        # programme needs (as a visit's reduction does)
        deadline = time.monotonic() + 12 * 3600
        while scheduler and not all(t.complete() for t in tasks) and others_running(summary) \
                and not any(f.exists() and any(f.iterdir()) for f in failure_dirs) \
                and time.monotonic() < deadline:
            time.sleep(2.0)
            summary = luigi.build(tasks, **kwargs)
            done += ran_tasks(summary)
    finally:
        PROGRESS.pop("callback", None)
    ran_list = sorted((t.task_family, str(getattr(t, "visit", getattr(t, "programme", ""))))
                      for t in done)
    messages, statuses = [], []
    for folder in failure_dirs:
        if not folder.exists():
            continue
        for file in sorted(folder.glob("*.txt")):
            text = file.read_text(encoding="utf-8").rstrip()
            status, _, rest = text.partition("\n")
            if status.isdigit():
                text = rest
                statuses.append(int(status))
            else:
                statuses.append(2 if text.startswith("lightledger: error:") else 1)
            if text not in messages:
                messages.append(text)
        shutil.rmtree(folder, ignore_errors=True)
    ok = all(t.complete() for t in tasks)
    if not ok and not messages:
        messages.append(f"lightledger: error: the reduction did not complete ({summary.status})")
    for plan in plans:
        if ok:
            stages_run = STAGE_ORDER[:STAGE_ORDER.index(last) + 1]
            note_last_used(plan.visit.notebook,
                           os.path.relpath(prog.notebook.resolve(),
                                           Path(plan.visit.notebook).resolve()),
                           [plan.folder(s) for s in stages_run])
        write_page(plan.visit.notebook)
    page = final = None
    entries = []
    if until == "detrend":
        if ok:
            note_last_used(prog.notebook, "programme", [tasks[0].folder])
        write_page(prog.notebook)
        page = write_programme_page(prog, tasks[0].folder)
        final = tasks[0].final_product() if ok else None
        entries = [tasks[0].output().path]
    elif ok:
        final = tasks[-1].final_product()
    flags = []
    for path in entries:
        entry = read_entry(path) or {}
        flags += [f"lightledger: warning: {w}" for w in entry.get("warnings", [])]
    return ProgrammeResult(ok=ok, final=final, page=page, ran=sorted(f for f, _ in ran_list),
                           ran_tasks=ran_list, messages=messages, warnings=warnings_,
                           set_aside=set_aside, status=0 if ok else exit_status(statuses),
                           flags=flags, headlines=headlines(entries) if ok else [])
