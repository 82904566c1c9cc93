"""The programme's joint stage: every visit's systematics and one planet, fitted together.

:class:`JointDetrend` is a notebook stage like a visit's
(:class:`~lightledger.tasks.base.FolderTask`): it reads each visit's light
curves (the ``bin`` stage's product), fits the programme once per member of
its grid of systematics models (:func:`joint_members`; the same model string
for every visit), ranks and marginalises the planet over them
(:func:`lightledger.pipeline.phasegrid.fit_phase_grid`), fits each visit
alone for comparison, and writes the phase-curve products
(:func:`lightledger.tasks.phasecurve.write_phase_products`) with its entry
into ``NOTEBOOK/joint-IDENT/``.
"""

import json
import socket
import time
from datetime import datetime, timezone
from pathlib import Path

import luigi
import numpy as np

from lightledger.pipeline import __version__
from lightledger.pipeline.errors import LightledgerError
from lightledger.pipeline.parameters import STAGE_ORDER, STAGES

from .applicability import not_applying
from .base import (ENTRY_NAME, FolderTask, product_digest,
                   settings_from_text, user_name, visit_config)
from .products import Provenance, relative_input, write_json
from .programmefile import (joint_facts, joint_identity, joint_params, load_programme,
                            split_settings)

__all__ = ["JointDetrend", "joint_members"]


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
        return split_settings(self.settings)[1]

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

    def final_product(self):
        return self.folder / "planet.fits"

    # an internal error's line names the programme and the stage, not the task family
    failure_names_task = False

    def _failure_context(self):
        return f"{self.programme} (joint stage)"

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
            names=[v.name for v in visits], alone=alone, grid=grid, target=visits[0].target,
            event=event)
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
            "not_applying": not_applying("joint", prog.params, {}),
            "figures": [Path(f).name for f in figs],
            "warnings": [str(w) for w in warnings],
        }
        write_json(self.output().path, entry)
