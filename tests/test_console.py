"""The command line's progress bars and help (lightledger.tasks.console, tasks.cli)."""

import argparse
import io
import re
import sys

import pytest

from lightledger.tasks import cli
from lightledger.tasks.console import Progress


class FakeTerminal(io.StringIO):
    def isatty(self):
        return True


def _segments(text):
    """The successive states of the terminal line: text between carriage returns."""
    return [s for s in re.split(r"[\r\n]", text) if s]


def test_parts_of_a_stage_fill_one_bar_and_every_line_is_rewritten_whole():
    out = FakeTerminal()
    bar = Progress(out)
    # three chunks of 4 exposures each (a visit of 12), reported interleaved as
    # parallel workers would, then the joining task's completion
    for done in range(5):
        for part in (0, 1, 2):
            bar("calibrate", "calibrating exposures", min(done, 4), 12, part=part)
    bar("calibrate", "exposures calibrated", 12, 12)
    bar("bin", "binning", 0, 3)
    bar("bin", "a much shorter text", 1, 3)
    text = out.getvalue()
    lines = text.split("\n")
    assert sum("calibrate [" in line for line in lines) == 1      # one line for the stage
    counts = [int(m) for m in re.findall(r"(\d+)/12", lines[0])]
    assert counts == sorted(counts) and counts[-1] == 12 and 12 in counts
    # every state of the line has the same width (padded): nothing of a longer one remains
    widths = {len(s) for s in _segments(text)}
    assert len(widths) == 1
    assert lines[1].count("\r") == 2 and "a much shorter text" in lines[1]
    bar.close()
    assert out.getvalue().endswith("\n")
    before = out.getvalue()
    bar.close()                                   # nothing open: writes nothing
    assert out.getvalue() == before


def test_a_file_gets_whole_lines_only_at_start_end_and_intervals():
    out = io.StringIO()
    bar = Progress(out, interval=3600.0)
    for done in range(10):
        bar("extract", "extracting spectra", done, 10, part=0)
    bar("extract", "spectra extracted", 10, 10)
    lines = out.getvalue().splitlines()
    assert len(lines) == 2 and "\r" not in out.getvalue()
    assert "0/10" in lines[0] and "10/10" in lines[1]


def test_a_programmes_joint_fit_has_its_bar(tmp_path):
    # The joint fit (one full-orbit fit per model of its grid) is long work: its task's
    # progress reports reach the command line's bars like a visit stage's (the rule that
    # long work shows progress).
    from types import SimpleNamespace

    from lightledger.tasks import foldertask
    from lightledger.tasks.joint import JointDetrend

    out = io.StringIO()
    bar = Progress(out, interval=3600.0)
    task = JointDetrend(programme=str(tmp_path / "prog.toml"), chains="[]")
    task.__dict__["_config"] = SimpleNamespace(notebook=tmp_path)
    with pytest.MonkeyPatch.context() as patch:
        patch.setitem(foldertask.PROGRESS, "callback", bar)
        for done in range(6):
            task.progress(done, 5, "joint fit, visit1+orbit1+scan+ramp")
    lines = out.getvalue().splitlines()
    assert len(lines) == 2 and all(line.strip().startswith("joint [") for line in lines)
    assert "0/5" in lines[0] and "5/5" in lines[1]


def test_interruption_message_starts_its_own_line(monkeypatch, capsys):
    class StderrTerminal:
        def isatty(self):
            return True

        def write(self, text):
            sys.stderr.write(text)

        def flush(self):
            sys.stderr.flush()

    def interrupted(args):
        bar = cli.Progress(StderrTerminal())
        bar("calibrate", "calibrating exposures", 3, 10, part=0)
        raise KeyboardInterrupt

    monkeypatch.setitem(cli._COMMANDS, "params", interrupted)
    assert cli.main(["params"]) == 130
    err = capsys.readouterr().err
    assert "\nlightledger: interrupted" in err
    assert err.splitlines()[-1].startswith("lightledger: interrupted")


def _subparsers(parser):
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            return action.choices
    return {}


@pytest.mark.parametrize("command", sorted(_subparsers(cli._parser())))
def test_every_option_has_help_and_its_default(command):
    parser = _subparsers(cli._parser())[command]
    for action in parser._actions:
        if isinstance(action, (argparse._HelpAction, argparse._VersionAction)):
            continue
        assert action.help, f"{command} {action.dest}: no help"
        takes_value = action.nargs != 0
        optional_value = action.option_strings or action.nargs == "?"
        if takes_value and optional_value and action.dest not in ("scenario", "outdir"):
            assert "default" in action.help, f"{command} {action.dest}: default not stated"


def test_exposure_ranges_are_in_the_help():
    sim = _subparsers(cli._parser())["simulate"].format_help()
    assert re.search(r"--exposures 2 to \d+", sim)
    demo = _subparsers(cli._parser())["demo"].format_help()
    assert re.search(r"\d+ to \d+", demo)
