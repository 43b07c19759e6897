"""Long work shows progress on standard error unless --quiet.

Relaxation fits count finished models; sampling feeds nutpie's progress into
plain lines when standard error is not a terminal (CI logs). The command
line shows progress unless ``--quiet``, whether or not it runs in a
terminal. End-to-end output of a real run (plain sampling lines in a log,
silence with ``--quiet``) is checked in tests/test_nothing_lost.py, whose
runs already write to a pipe.
"""

from __future__ import annotations

import argparse
from types import SimpleNamespace

from workbench import harness
from workbench.commands import show_progress
from workbench.engine import Settings
from workbench.recipe import Assumption, Relaxation

SETTINGS = Settings(draws=10, tune=10, chains=1)


def _design():
    assumptions = tuple(
        Assumption(key=f"a{i}", statement="", relaxation=Relaxation(f"extra{i}", "", build=None, null=0.0,
                                                                     negligible=0.1))
        for i in range(3))
    return SimpleNamespace(assumptions=assumptions, options={})


def _fitter(design, data, seed, settings, relaxation, **kwargs):
    return SimpleNamespace(idata=relaxation.parameter, seconds=0.0)


def test_relaxation_fits_print_plain_counts_when_not_a_terminal(capsys):
    fits = harness.fit_relaxations(_design(), None, 1, SETTINGS, workers=1, say=lambda _: None,
                                   fitter=_fitter, progress=True)
    assert [f.idata for f in fits.values()] == ["extra0", "extra1", "extra2"]
    lines = capsys.readouterr().err.splitlines()
    assert lines[0] == "relaxed models: 0/3 done"
    assert lines[-1].startswith("relaxed models: 3/3 done")
    assert "\r" not in "".join(lines)


def test_relaxation_fits_are_silent_without_progress(capsys):
    harness.fit_relaxations(_design(), None, 1, SETTINGS, workers=1, say=lambda _: None,
                            fitter=_fitter, progress=False)
    assert capsys.readouterr().err == ""


def test_command_line_shows_progress_unless_quiet():
    # Under pytest standard error is not a terminal: logs get progress too.
    assert show_progress(argparse.Namespace(quiet=False)) is True
    assert show_progress(argparse.Namespace(quiet=True)) is False
