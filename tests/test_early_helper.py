"""The helper process a check starts before its base fit shares the relaxed models."""

from __future__ import annotations

import os
import time

import pytest

from workbench import executor, harness


def _pid_in_helper(name):
    # Stands in for a relaxed fit: (its "DataTree", its seconds).
    return {"name": name, "pid": os.getpid()}, 0.0


def _broken_in_helper(name):
    raise RuntimeError(f"helper cannot fit {name}")


def _share(there_function, slow_here: float):
    helper = harness.EarlyHelper()
    try:
        def here(name):
            # This process waits for the helper's start-up, then works slowly,
            # so the helper has time to take models from the queue.
            helper.ready.result(timeout=300)
            time.sleep(slow_here)
            return {"name": name, "pid": os.getpid()}, 0.0

        advanced = []
        names = ["a", "b", "c", "d", "e"]
        got = helper.share(names, here, lambda n: (there_function, n), lambda: advanced.append(1))
        return names, got, advanced
    finally:
        helper.close()


@pytest.mark.skipif(executor.cores() < 2, reason="the early helper needs a second core")
def test_both_processes_fit_and_every_model_comes_back_in_order():
    names, got, advanced = _share(_pid_in_helper, slow_here=1.0)
    assert list(got) == names
    assert [fit.idata["name"] for fit in got.values()] == names
    pids = {fit.idata["pid"] for fit in got.values()}
    assert os.getpid() in pids and len(pids) == 2, "the helper took no model off the queue"
    # The helper takes models from the back of the queue, this process from the front.
    assert got["a"].idata["pid"] == os.getpid() and got["e"].idata["pid"] != os.getpid()
    assert len(advanced) == len(names)


@pytest.mark.skipif(executor.cores() < 2, reason="the early helper needs a second core")
def test_a_failing_helper_leaves_its_models_to_this_process():
    names, got, advanced = _share(_broken_in_helper, slow_here=0.2)
    assert list(got) == names
    assert {fit.idata["pid"] for fit in got.values()} == {os.getpid()}
    assert len(advanced) == len(names)


def test_the_helper_starts_only_with_two_relaxed_models_a_second_core_and_default_workers():
    two_cores = executor.cores() >= 2
    assert harness.EarlyHelper.wanted(3, None, True) is two_cores
    assert not harness.EarlyHelper.wanted(1, None, True)
    assert not harness.EarlyHelper.wanted(3, 1, True)
    assert not harness.EarlyHelper.wanted(3, None, False)


@pytest.mark.skipif(executor.cores() < 2, reason="the early helper needs a second core")
def test_a_default_check_shares_its_relaxed_models_with_the_helper(tmp_path):
    # The default path as a user runs it: api.check with no workers argument.
    import numpy as np

    from workbench import api, engine, registry

    scenario = registry.load().get("threshold-geometry").demo(np.random.default_rng(4))
    table = tmp_path / "table.csv"
    scenario.table.to_csv(table, index=False)
    said = []
    api.check("threshold-geometry", str(table), options=dict(scenario.options),
              settings=engine.Settings(draws=100, tune=100, chains=2), write=False, say=said.append)
    assert any("in this process and one helper" in line for line in said), said
