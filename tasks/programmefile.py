"""A programme description: its schema and validation, and the joint stage's identity.

:func:`load_programme` reads a programme description (TOML; see
:mod:`lightledger.tasks.programme` for its layout), checks it like a visit
description (one line per problem, naming the file and the key) and loads
every visit it lists.  :func:`joint_identity` hashes what the programme's
joint stage depends on (its version and parameters, :func:`joint_facts`,
every visit's ``bin`` identity), so that a tweak to one visit re-makes the
joint fit and nothing of the other visits.
"""

import tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from lightledger.pipeline.errors import ConfigError, ParameterError
from lightledger.pipeline.orbit import Ephemeris
from lightledger.pipeline.parameters import resolve

from .base import content_identity, settings_from_text, settings_to_text, stage_params, visit_config
from .config import Key, check_schema, read_toml
from .problems import Problems

__all__ = ["PROGRAMME_SCHEMA", "Programme", "load_programme", "is_programme", "joint_dir",
           "joint_identity", "joint_facts", "joint_params", "split_settings"]

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


def split_settings(settings_text):
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
