"""Every row of tests/bad_inputs.py: exit 2, one line on stderr, no traceback, the fragment."""

from __future__ import annotations

import pytest

from bad_inputs import CASES
from workbench.cli import main


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_bad_input_stops_at_the_boundary_with_one_line(case, tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)  # nothing may land in the repository's reports/
    for name, content in case.files.items():
        path = tmp_path / name.format(tmp=tmp_path)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(content if isinstance(content, bytes) else content.encode("utf-8"))
    code = main([a.format(tmp=tmp_path) for a in case.args])
    err = capsys.readouterr().err
    assert code == case.exit_code
    assert err.count("\n") == 1 and err.startswith("workbench: error: ")
    assert "Traceback" not in err
    assert case.fragment.format(tmp=tmp_path) in err
