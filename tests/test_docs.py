"""Docs that run: the docstring examples of the pure layers are executed."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import quietwell.analysis
import quietwell.physics


def _modules():
    for pkg in (quietwell.physics, quietwell.analysis):
        for info in pkgutil.iter_modules(pkg.__path__, pkg.__name__ + "."):
            yield info.name


@pytest.mark.parametrize("name", sorted(_modules()))
def test_docstring_examples_run(name):
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0, f"{result.failed} docstring example(s) of {name} failed"


def _readme_python_blocks() -> list[str]:
    import re
    from pathlib import Path

    text = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    return re.findall(r"^```python\n(.*?)^```", text, flags=re.S | re.M)


def test_readme_has_python_examples():
    assert len(_readme_python_blocks()) >= 2


def test_readme_python_examples_run_against_a_real_store(tmp_path_factory):
    # every ```python block of the README, in order, on a store written by the real
    # plans (tests/results_store.py) in place of quietwell-data/
    from results_store import shared_store

    import quietwell.store

    data_dir, written = shared_store(tmp_path_factory)
    for i, block in enumerate(_readme_python_blocks()):
        if "REManagerAPI" in block:
            # the queue-server example needs a running RE manager on a setup's PC:
            # tests/test_queue.py makes exactly these calls (item_add of BPlan("campaign",
            # path), environment_open, wait_for_idle, queue_start) against a real one;
            # here it must at least compile and name only those calls
            compile(block, f"README.md python block {i + 1}", "exec")
            for call in ("item_add(BPlan(\"campaign\"", "environment_open()",
                         "wait_for_idle()", "queue_start()"):
                assert call in block, call
            continue
        code = block.replace('"quietwell-data"', repr(str(data_dir)))
        namespace: dict = {}
        try:
            exec(compile(code, f"README.md python block {i + 1}", "exec"), namespace)
        finally:
            quietwell.store.close_catalog(data_dir)  # free the directory for other tests
        if "rates" in namespace:  # the tables example: the usable reheating runs
            usable = [w.uid for w in written if w.plan == "reheating_cycles"
                      and w.exit_status == "success" and not w.superseded_by]
            assert list(namespace["rates"]["uid"]) == usable
        if "run" in namespace:  # the read-back example: the last thermal calibration
            last = [w for w in written if w.plan == "thermal_calibration"][-1]
            assert namespace["run"].metadata["start"]["uid"] == last.uid
