"""A subject that crashes, hangs or returns garbage becomes a verdict, never a refops traceback."""
import pytest

from refops.harness import check_layer

HERE = "tests/harness/torch_layers.py"


@pytest.mark.parametrize("fault, status, words", [
    ("raises", "subject-error", "RuntimeError: kernel not implemented"),
    ("wrong_shape", "failed", "the output has shape"),
    ("wrong_dtype", "failed", "the output has dtype float64, expected float32"),
    ("nan", "failed", None),
])
def test_faults_in_process(fault, status, words):
    import torch_layers
    report = check_layer(getattr(torch_layers, fault), "relu", cases=3, seed=0)
    assert [c.status for c in report.cases] == [status] * 3
    case = report.cases[0]
    if words:
        assert words in case.message + " ".join(case.findings)
    else:  # NaN where the oracle is finite
        assert any(c.nonfinite_mismatches > 0 for c in case.comparisons)


def test_a_hang_is_a_timeout_and_the_sweep_goes_on():
    report = check_layer(f"{HERE}:hang", "relu", cases=2, seed=0, timeout=3)
    assert [c.status for c in report.cases] == ["timeout", "timeout"]
    assert "time limit of 3 s" in report.cases[0].message


def test_an_abort_is_a_verdict_and_the_worker_restarts():
    report = check_layer(f"{HERE}:abort", "relu", cases=2, seed=0)
    assert [c.status for c in report.cases] == ["aborted", "aborted"]
    assert "aborted the process" in report.cases[0].message
    assert report.cases[1].replay.endswith("--case 0-1")


def test_replies_that_arrive_together_are_all_read(monkeypatch):
    # Regression: the worker's replies to one batch can all be in the pipe before the parent
    # reads the first; none may then be mistaken for a subject that hangs.
    import time
    import refops.harness.worker as worker

    class LateReader(worker.Worker):
        waits = 0

        def _wait_readable(self, seconds):
            self.waits += 1
            if self.waits == 2:  # the first reply of the batch: let the worker write them all
                time.sleep(2.0)
            return super()._wait_readable(seconds)

    monkeypatch.setattr(worker, "Worker", LateReader)
    report = check_layer(f"{HERE}:relu", "relu", cases=16, seed=0, timeout=1)
    assert [c.status for c in report.cases] == ["passed"] * 16
