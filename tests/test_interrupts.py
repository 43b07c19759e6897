"""Ctrl-C stops a run even when a library swallows it, and no file is written after it."""

from __future__ import annotations

import os
import signal
import stat

import pytest

from workbench import interrupts, writers


class PanicException(BaseException):
    """Stands in for pyo3's exception of that name (Rust code that met a Python error)."""


def test_a_rust_panic_caused_by_ctrl_c_arrives_as_keyboard_interrupt():
    with pytest.raises(KeyboardInterrupt):
        with interrupts.interrupts_kept():
            raise PanicException("Failed to access NumPy array API capsule: PyErr { type: "
                                 "<class 'KeyboardInterrupt'>, value: KeyboardInterrupt() }")


def test_another_rust_panic_is_left_as_it_is():
    with pytest.raises(PanicException):
        with interrupts.interrupts_kept():
            raise PanicException("index out of bounds")


def test_a_swallowed_ctrl_c_is_raised_again_at_the_next_check():
    with interrupts.watched():
        try:
            os.kill(os.getpid(), signal.SIGINT)
        except KeyboardInterrupt:
            pass  # what a careless library does
        with pytest.raises(KeyboardInterrupt):
            interrupts.raise_if_interrupted()
    assert signal.getsignal(signal.SIGINT) is not interrupts._note_and_raise


def test_no_file_is_written_after_ctrl_c(tmp_path):
    target = tmp_path / "summary.json"
    target.write_text("previous run")
    with interrupts.watched():
        try:
            os.kill(os.getpid(), signal.SIGINT)
        except KeyboardInterrupt:
            pass
        with pytest.raises(KeyboardInterrupt):
            writers.atomic_write(target, "new run")
        with pytest.raises(KeyboardInterrupt):
            writers.atomic_write_with(tmp_path / "posterior.nc", lambda path: open(path, "w").close())
    assert target.read_text() == "previous run"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["summary.json"]


def test_a_new_watch_starts_without_the_earlier_interrupt():
    with interrupts.watched():
        try:
            os.kill(os.getpid(), signal.SIGINT)
        except KeyboardInterrupt:
            pass
    with interrupts.watched():
        interrupts.raise_if_interrupted()


def test_written_files_get_the_mode_a_plain_open_would_give(tmp_path):
    plain = tmp_path / "plain.txt"
    plain.write_text("x")
    for path in (writers.atomic_write(tmp_path / "a.json", "{}"),
                 writers.atomic_write_with(tmp_path / "b.nc", lambda p: open(p, "w").close())):
        assert stat.S_IMODE(path.stat().st_mode) == stat.S_IMODE(plain.stat().st_mode)


def test_an_error_raised_because_of_ctrl_c_ends_the_command_as_interrupted(monkeypatch, capsys):
    from workbench import cli

    class Failing:
        NAME = "recipes"

        @staticmethod
        def run(args):
            try:
                os.kill(os.getpid(), signal.SIGINT)
            except KeyboardInterrupt as err:  # compiled code reports the interrupt as its own error
                raise SystemError("returned a result with an exception set") from err

    monkeypatch.setattr(cli, "commands", lambda: {"recipes": Failing})
    monkeypatch.setattr(cli, "build_parser", lambda: _parser_for("recipes"))
    assert cli.main(["recipes"]) == 130
    assert capsys.readouterr().err.strip() == "workbench: interrupted; finished files are kept"


def test_an_error_without_ctrl_c_is_not_taken_for_an_interrupt(monkeypatch):
    from workbench import cli

    class Failing:
        @staticmethod
        def run(args):
            raise SystemError("a real bug")

    monkeypatch.setattr(cli, "commands", lambda: {"recipes": Failing})
    monkeypatch.setattr(cli, "build_parser", lambda: _parser_for("recipes"))
    with pytest.raises(SystemError):
        cli.main(["recipes"])


def _parser_for(name):
    import argparse

    parser = argparse.ArgumentParser()
    parser.add_argument("command")
    return parser
