"""A notebook that stays true after forcing, damage, concurrent and interrupted runs.

References: file bytes (SHA-256, FIPS 180-4, through hashlib), the FITS
checksum convention as astropy verifies it, POSIX advisory locks
(flock(2): released when the holder dies) and SIGKILL (signal(7): the
process gets no chance to clean up), and Luigi's scheduler summary of
which tasks ran.  The reference for "the same products" is a reduction of
the same rendered visit by one reducer alone.
"""

import json
import multiprocessing
import os
import shutil
import signal
import time
import warnings
from pathlib import Path

import pytest

from lightledger.synthetic_data.render import render
from lightledger.tasks import locks
from lightledger.tasks.audit import audit
from lightledger.tasks.cli import main as cli_main
from lightledger.tasks.notebook import collect_entries, current_chain, prune, render_page
from lightledger.tasks.run import reduce_visit

pytestmark = [pytest.mark.slow, pytest.mark.usefixtures("quick_figures")]

N_EXPOSURES = 12
FORK = multiprocessing.get_context("fork")


def _reduce(visit, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return reduce_visit(visit, **kwargs)


@pytest.fixture(scope="module")
def reduced(tmp_path_factory, quick_figures, short_grid):
    """A 12-exposure scan visit rendered and reduced once by one reducer (the reference).

    Its detrend stage fits the short grid (tests/conftest.py): what is tested is the
    notebook, whatever the stages compute.
    """
    root = tmp_path_factory.mktemp("integrity")
    visit = short_grid(render("scan-transit", root / "visit", seed=11, n_exposures=N_EXPOSURES))
    shutil.copytree(root / "visit", root / "pristine")          # never reduced
    result = _reduce(visit)
    assert result.ok, result.messages
    return Path(visit), root / "pristine"


def _copy(folder, dst):
    shutil.copytree(folder, dst)
    return Path(dst) / "visit.toml"


def _current(notebook):
    """{folder name: {file name: bytes}} of the current (not superseded) stage folders."""
    out = {}
    for folder in sorted(Path(notebook).iterdir()):
        if folder.is_dir() and not folder.name.startswith(".") and ".superseded-" not in folder.name:
            out[folder.name] = {p.name: p.read_bytes() for p in folder.iterdir()
                                if not p.name.startswith(".") and p.name != "entry.json"}
    return out


def test_audit_finds_deleted_products_and_entries_garbage_entries_and_edited_ecsv(reduced, tmp_path):
    visit, _ = reduced
    cases = {
        "deleted product": (lambda nb: next(nb.glob("detrend-*/detrended.fits")).unlink(),
                            "missing (its entry lists it)"),
        "deleted entry": (lambda nb: next(nb.glob("bin-*/entry.json")).unlink(),
                          "its entry.json is missing"),
        "garbage entry": (lambda nb: next(nb.glob("extract-*/entry.json")).write_text("[]"),
                          "not a valid notebook entry"),
        "edited ecsv": (lambda nb: _edit_ecsv(next(nb.glob("bin-*/channels.ecsv"))),
                        "its bytes differ from its own checksum"),
    }
    for name, (damage, expected) in cases.items():
        copy = _copy(visit.parent, tmp_path / name.replace(" ", "-"))
        notebook = copy.parent / "notebook"
        assert audit(notebook).problems == [], name
        damage(notebook)
        problems = audit(notebook).problems
        assert any(expected in p for p in problems), (name, problems)


def _edit_ecsv(path):
    lines = path.read_text().splitlines(keepends=True)
    last = lines[-1].split(" ")
    last[1] = repr(float(last[1]) + 1e-4)          # a channel edge moved, nothing else
    lines[-1] = " ".join(last)
    path.write_text("".join(lines))


def test_audit_reports_unreadable_inputs_without_a_traceback(reduced, tmp_path, capsys):
    visit, _ = reduced
    copy = _copy(visit.parent, tmp_path / "copy")
    raw = sorted((copy.parent / "raw").glob("*.fits"))[0]
    raw.write_text("not a FITS file\n")
    (copy.parent / "calibration" / "throughput.ecsv").write_bytes(b"\x00\xff garbage")
    status = cli_main(["audit", str(copy.parent / "notebook")])
    captured = capsys.readouterr()
    assert status == 1
    assert "Traceback" not in captured.err + captured.out
    assert f"input {raw} has changed" in captured.err
    assert "throughput.ecsv has changed" in captured.err


def test_editing_a_later_stage_in_the_visit_reruns_only_that_stage(reduced, tmp_path):
    visit, _ = reduced
    copy = _copy(visit.parent, tmp_path / "copy")
    notebook = copy.parent / "notebook"
    text = copy.read_text()
    assert "[stages.detrend]\n" in text
    copy.write_text(text.replace("[stages.detrend]\n", "[stages.detrend]\npermutation_shifts = 50\n"))
    assert audit(notebook).problems == []              # the bytes of visit.toml are not an input
    result = _reduce(copy)
    assert result.ok, result.messages
    assert result.ran == ["Detrend"]
    assert audit(notebook).problems == []


def test_force_reruns_the_stage_and_the_old_lineage_survives(reduced, tmp_path, monkeypatch):
    visit, _ = reduced
    copy = _copy(visit.parent, tmp_path / "copy")
    notebook = copy.parent / "notebook"
    with pytest.raises(Exception, match="--force detrend with --until bin"):
        _reduce(copy, until="bin", force=["detrend"])
    assert not list(notebook.glob("*.superseded-*"))   # nothing moved aside by the refusal

    # a changed bin code (same version) writes different bytes: the old detrend entry must
    # still point at the bin products it was made from, now in the superseded folder
    from lightledger.tasks import lightcurves
    real = lightcurves.write_fits

    def marked(path, hdus, prov, *, header=None):
        return real(path, hdus, prov, header={**(header or {}), "LLTEST": "changed code"})

    monkeypatch.setattr(lightcurves, "write_fits", marked)
    forced = _reduce(copy, force=["bin"])
    assert forced.ok, forced.messages
    assert sorted(forced.ran) == ["Bin", "Detrend"]
    old = sorted(p.name.split(".")[0] for p in notebook.glob("*.superseded-*"))
    assert [n.split("-")[0] for n in old] == ["bin", "detrend"]
    assert audit(notebook).problems == []
    # the superseded detrend product resolves its input to the superseded bin folder
    from lightledger.tasks.audit import _Checker
    checker = _Checker()
    old_detrend = next(notebook.glob("detrend-*.superseded-*")) / "detrended.fits"
    assert checker.check(old_detrend) == []
    assert any(".superseded-" in p.parent.name for p in checker.inputs[old_detrend])

    # prune keeps what current entries need and removes the superseded pair
    _, would, _ = prune(notebook, dry_run=True)
    assert sorted(n.split("-")[0] for n in would) == ["bin", "detrend"]
    assert len(list(notebook.glob("*.superseded-*"))) == 2
    _, removed, freed = prune(notebook)
    assert removed == would and freed > 0
    assert not list(notebook.glob("*.superseded-*"))
    assert audit(notebook).problems == []


def test_prune_removes_older_entries_nothing_current_needs(reduced, tmp_path, capsys):
    # Housekeeping by the notebook's own lineage (entry inputs by SHA-256): a tweak of the
    # detrend stage makes a second detrend entry; while the last reduction used the first
    # (settings put back: nothing runs), prune keeps both; once the last reduction uses the
    # tweak again, the first is an older entry that nothing current needs: `notebook prune
    # --dry-run` lists it with why and removes nothing, prune removes exactly it, and the
    # notebook still audits clean.
    visit, _ = reduced
    copy = _copy(visit.parent, tmp_path / "copy")
    notebook = copy.parent / "notebook"
    first = {p.name for p in notebook.glob("detrend-*")}
    tweak = [("detrend", "models", ("visit1+scan+ramp",))]      # one model: a short fit
    assert _reduce(copy, settings=tweak).ran == ["Detrend"]
    assert _reduce(copy).ran == []                   # back to the first settings: reused
    assert prune(notebook, dry_run=True)[1] == []    # the last reduction's chain is current
    assert _reduce(copy, settings=tweak).ran == []
    detrends = {p.name for p in notebook.glob("detrend-*")}
    assert len(detrends) == 2 and len(first) == 1
    assert cli_main(["notebook", "prune", str(notebook), "--dry-run"]) == 0
    out = capsys.readouterr().out
    listed = {line.split()[2].rstrip(":") for line in out.splitlines()
              if line.startswith("would remove ")}
    assert listed == first, out
    assert "older entry that no current entry was made from" in out
    assert {p.name for p in notebook.glob("detrend-*")} == detrends      # nothing removed
    _, removed, _ = prune(notebook)
    assert set(removed) == first
    assert {p.name for p in notebook.glob("detrend-*")} == detrends - first
    assert len(list(notebook.glob("bin-*"))) == 1 and audit(notebook).problems == []


def _forked_reduce(visit, out, kwargs, slow=0.0):
    if slow:
        # every stage takes at least `slow` seconds, so that runs started 0.5 s apart overlap
        # (what is tested is overlap, not the speed of a tiny visit)
        from lightledger.tasks import figures
        for name in dir(figures):
            if name.endswith("_figure"):
                setattr(figures, name, _slowed(getattr(figures, name), slow))
    result = _reduce(visit, **kwargs)
    Path(out).write_text(json.dumps({"ok": result.ok, "ran": result.ran, "messages": result.messages}))


def _slowed(function, seconds):
    def slow(*args, **kwargs):
        time.sleep(seconds)
        return function(*args, **kwargs)
    return slow


def _run_two(visit, tmp_path, kwargs, name):
    """Two reducers of one visit started 0.5 s apart (forked processes); their results."""
    outs = [tmp_path / f"{name}-{k}.json" for k in range(2)]
    procs = []
    for out in outs:
        proc = FORK.Process(target=_forked_reduce, args=(visit, out, kwargs, 1.5))
        proc.start()
        procs.append(proc)
        time.sleep(0.5)
    for proc in procs:
        proc.join(300)
        assert proc.exitcode == 0
    return [json.loads(o.read_text()) for o in outs]


def _counts(results):
    counts = {}
    for r in results:
        assert r["ok"], r["messages"]
        for family in r["ran"]:
            counts[family] = counts.get(family, 0) + 1
    return counts


def test_two_reducers_half_a_second_apart_make_each_product_once(reduced, tmp_path):
    visit, pristine = reduced
    copy = _copy(pristine, tmp_path / "copy")
    results = _run_two(copy, tmp_path, {}, "plain")
    # 12 exposures in one chunk of 16: one task of each kind, run by one reducer or the other
    assert _counts(results) == {"Inventory": 1, "CalibrateChunk": 1, "Calibrate": 1,
                                "ExtractReference": 1, "ExtractChunk": 1, "Extract": 1, "Bin": 1,
                                "Detrend": 1}
    notebook = copy.parent / "notebook"
    assert audit(notebook).problems == []
    assert _current(notebook) == _current(visit.parent / "notebook")   # a single run's bytes

    results = _run_two(copy, tmp_path, {"force": ["bin"]}, "forced")
    assert _counts(results) == {"Bin": 1, "Detrend": 1}
    assert audit(notebook).problems == []
    assert len(list(notebook.glob("bin-*.superseded-*"))) == 1
    assert _current(notebook) == _current(visit.parent / "notebook")


def test_a_killed_reducer_leaves_nothing_stuck(reduced, tmp_path):
    visit, pristine = reduced
    copy = _copy(pristine, tmp_path / "copy")
    proc = FORK.Process(target=_forked_reduce, args=(copy, tmp_path / "killed.json", {}))
    proc.start()
    notebook = copy.parent / "notebook"
    deadline = time.monotonic() + 120
    while not list(notebook.glob("calibrate-*/frames-000.fits")) and time.monotonic() < deadline:
        time.sleep(0.05)
    os.kill(proc.pid, signal.SIGKILL)
    proc.join()
    # a temporary file a dead writer left, and one a live writer (holding the folder) is writing
    calibrate = next(notebook.glob("calibrate-*"))
    dead = calibrate / ".frames-000-deadbeef.fits.part"
    dead.write_bytes(b"partial")
    busy = notebook / "extract-0123456789"
    busy.mkdir()
    live = busy / ".spectra-000-cafe.fits.part"
    live.write_bytes(b"being written")
    held = locks.acquire(locks.folder_lock_path(busy), shared=True)
    try:
        result = _reduce(copy)
    finally:
        locks.release(held)
    assert result.ok, result.messages
    assert not dead.exists() and live.exists()
    shutil.rmtree(busy)
    assert not list(notebook.rglob(".*.part"))
    assert audit(notebook).problems == []
    assert _current(notebook) == _current(visit.parent / "notebook")


def test_rendering_again_reuses_every_product(reduced, tmp_path, short_grid):
    visit, _ = reduced
    copy = _copy(visit.parent, tmp_path / "copy")
    render("scan-transit", copy.parent, seed=11, n_exposures=N_EXPOSURES)   # as `demo` does again
    short_grid(copy)                                     # the description as the fixture made it
    again = _reduce(copy)
    assert again.ok and again.ran == []
    assert len(collect_entries(copy.parent / "notebook")) == 4


def test_the_page_embeds_only_the_entrys_own_figures(reduced, tmp_path):
    visit, _ = reduced
    copy = _copy(visit.parent, tmp_path / "copy")
    notebook = copy.parent / "notebook"
    secret = tmp_path / "secret.png"
    secret.write_bytes(b"\x89PNG\r\n\x1a\n" + b"S" * 64)
    entry_path = next(notebook.glob("bin-*/entry.json"))
    entry = json.loads(entry_path.read_text())
    entry["figures"] += [str(secret), "../" + next(notebook.glob("detrend-*")).name + "/detrend.png",
                         "entry.json"]
    entry_path.write_text(json.dumps(entry))
    own = sum(len([f for f in json.loads(p.read_text())["figures"] if "/" not in f
                   and f.endswith(".png")]) for p in notebook.glob("*/entry.json"))
    page = render_page(notebook)["index.html"]
    import base64
    assert base64.b64encode(secret.read_bytes()).decode()[:40] not in page
    assert page.count("data:image/png;base64,") == own        # the current chain's own figures
    assert 'href="#' + entry_path.parent.name + '"' in page  # the contents list
    assert page.count("&larr; current chain") == 4


# ---------------------------------------------------------------------------
# a property test: any sequence of tweaks, forced runs, partial runs, kills and copies
# ---------------------------------------------------------------------------

from hypothesis import HealthCheck, example, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from lightledger.pipeline.errors import LightledgerError  # noqa: E402
from lightledger.pipeline.parameters import STAGE_ORDER  # noqa: E402
from lightledger.tasks.base import make_plan, read_entry, settings_to_text, visit_config  # noqa: E402

#: The --set tweaks a step may choose (cheap ones: they re-run extract or detrend only).
TWEAKS = ([], [("detrend", "permutation_shifts", 50)], [("extract", "clip_threshold", 4.0)])
#: Examples and steps of the property test in the suite; a longer run by hand sets
#: LIGHTLEDGER_PROPERTY_EXAMPLES (see tests/benchmarks/README.md).
EXAMPLES = int(os.environ.get("LIGHTLEDGER_PROPERTY_EXAMPLES", "2"))
STEPS = int(os.environ.get("LIGHTLEDGER_PROPERTY_STEPS", "3"))

_reduce_step = st.tuples(st.just("reduce"), st.integers(0, len(TWEAKS) - 1),
                         st.sampled_from(STAGE_ORDER), st.sampled_from([None, *STAGE_ORDER]))
_kill_step = st.tuples(st.just("kill"), st.integers(0, len(TWEAKS) - 1),
                       st.sampled_from([0.3, 1.0, 2.5]), st.sampled_from([None, "extract", "bin"]))
_steps = st.lists(st.one_of(_reduce_step, _kill_step, st.just(("copy",)), st.just(("prune",))),
                  min_size=1, max_size=STEPS)


def _entries(notebook):
    """Folder names of every stage folder with a valid entry."""
    return {p.name for p in Path(notebook).iterdir()
            if p.is_dir() and read_entry(p / "entry.json") is not None}


def _chain_bytes(visit, tweak, until):
    """{folder: {file: bytes}} of the chain a reduction with ``tweak`` up to ``until`` makes."""
    plan = make_plan(visit_config(visit, settings_to_text(tweak)), settings_to_text(tweak))
    out = {}
    for stage in STAGE_ORDER[:STAGE_ORDER.index(until) + 1]:
        folder = plan.folder(stage)
        out[folder.name] = {p.name: p.read_bytes() for p in folder.iterdir()
                            if not p.name.startswith(".") and p.name != "entry.json"}
    return out


class _Lab:
    """One example's visit, the fresh reductions to compare with, and the checks."""

    fresh = {}       # tweak index -> {folder: {file: bytes}} of a fresh full reduction

    def __init__(self, root, reduced, pristine):
        self.root, self.pristine, self.reduced = root, pristine, reduced
        self.visit = _copy(reduced.parent, root / "lab-0")
        self.copies = 0

    def reference(self, index):
        if index not in _Lab.fresh:
            if TWEAKS[index]:
                fresh = _copy(self.pristine, self.root / f"fresh-{index}")
                assert _reduce(fresh, settings=TWEAKS[index]).ok
            else:       # the module's reference: the pristine visit reduced once, by one reducer
                fresh = self.reduced
            _Lab.fresh[index] = _chain_bytes(fresh, TWEAKS[index], STAGE_ORDER[-1])
        return _Lab.fresh[index]

    def step(self, step):
        notebook = self.visit.parent / "notebook"
        before = _entries(notebook)
        kind = step[0]
        completed = None
        if kind == "reduce":
            _, index, until, force = step
            force = [force] if force else []
            if force and STAGE_ORDER.index(force[0]) > STAGE_ORDER.index(until):
                with pytest.raises(LightledgerError):
                    _reduce(self.visit, settings=TWEAKS[index], until=until, force=force)
            else:
                result = _reduce(self.visit, settings=TWEAKS[index], until=until, force=force)
                assert result.ok, result.messages
                completed = (index, until)
        elif kind == "kill":
            _, index, delay, force = step
            proc = FORK.Process(target=_forked_reduce, args=(
                self.visit, self.root / "killed.json",
                {"settings": TWEAKS[index], "force": [force] if force else []}))
            proc.start()
            time.sleep(delay)
            os.kill(proc.pid, signal.SIGKILL)
            proc.join()
        elif kind == "copy":
            self.copies += 1
            target = self.root / f"lab-{self.copies}"
            shutil.copytree(self.visit.parent, target, copy_function=shutil.copy)   # cp -r
            self.visit = target / "visit.toml"
            notebook = target / "notebook"
        elif kind == "prune":
            kept = set(current_chain(collect_entries(notebook)))
            prune(notebook)
            assert kept <= _entries(notebook)
        self.check(notebook, before, kind, completed)

    def check(self, notebook, before, kind, completed):
        report = audit(notebook)
        assert report.problems == [], report.problems
        after = _entries(notebook)
        if kind == "prune":
            # what goes is superseded, or older and needed by nothing current (kept: the current
            # chain, checked in step(); audit above shows nothing kept lost what it was made from)
            assert after <= before
        else:
            for name in before - after:
                # an entry may only leave its name by being superseded by a replacement
                assert ".superseded-" not in name, name
                assert any(a.startswith(name + ".superseded-") for a in after), name
                replacement = notebook / name
                assert replacement.is_dir(), name
                if kind != "kill":
                    assert name in after, name
        if completed is not None:
            index, until = completed
            mine = _chain_bytes(self.visit, TWEAKS[index], until)
            reference = self.reference(index)
            assert mine == {k: reference[k] for k in mine}


@settings(max_examples=EXAMPLES, deadline=None, database=None, derandomize=EXAMPLES <= 2,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(steps=_steps)
@example(steps=[("reduce", 2, "bin", "extract"), ("kill", 1, 1.0, "bin"), ("copy",),
                ("reduce", 0, "detrend", None)])
def test_any_sequence_of_tweaks_forces_kills_and_copies_keeps_the_notebook_true(
        reduced, tmp_path_factory, steps):
    visit, pristine = reduced
    lab = _Lab(tmp_path_factory.mktemp("lab"), visit, pristine)
    print("steps:", steps)         # shown with pytest -s (the long run by hand)
    for step in steps:
        lab.step(step)
