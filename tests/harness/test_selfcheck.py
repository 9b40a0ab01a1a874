"""Operators without an oracle: the backward against finite differences of the subject's own forward."""
import numpy as np
import pytest
import torch

from refops.harness.selfcheck import check_self

HERE = "tests/harness/no_oracle_layers.py"


def test_the_right_backward_matches_torch_autograd_of_the_formula():
    # Reference: torch float64 autograd of y = x * sigmoid(a x + b), the composed formula.
    import no_oracle_layers
    layer = no_oracle_layers.GatedUnit().double()
    x = torch.randn(2, 3, 4, dtype=torch.float64, requires_grad=True)
    g = torch.randn(2, 3, 4, dtype=torch.float64)
    layer(x).backward(g)
    a, b = (p.detach().clone().requires_grad_() for p in (layer.a, layer.b))
    x2 = x.detach().clone().requires_grad_()
    (x2 * torch.sigmoid(a.reshape(1, -1, 1) * x2 + b.reshape(1, -1, 1))).backward(g)
    for mine, reference in ((x.grad, x2.grad), (layer.a.grad, a.grad), (layer.b.grad, b.grad)):
        np.testing.assert_allclose(mine.numpy(), reference.numpy(), rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("target", [f"{HERE}:gated_unit", "callable"])
def test_right_backwards_pass(target):
    import no_oracle_layers
    subject = no_oracle_layers.gated_unit if target == "callable" else target
    report = check_self(subject, [(2, 3, 5, 4)], cases=4, seed=1)
    assert [c.status for c in report.cases] == ["passed"] * 4, report.cases[0].findings
    distance = check_self(f"{HERE}:squared_distance", [(4, 6), (4, 6)], cases=3)
    assert distance.passed and distance.dtype == "float64"


@pytest.mark.parametrize("target, shapes, wrong", [
    ("gated_unit_slipped", [(2, 3, 4)], {"a", "b", "input0"}),   # sigmoid derivative without (1 - s)
    ("gated_unit_chain_slip", [(2, 3, 4)], {"input0"}),          # gradient through the gate dropped
    ("squared_distance_slipped", [(3, 5), (3, 5)], {"input1"}),  # no gradient for the second input
])
def test_slipped_backwards_are_caught_on_the_wrong_tensors(target, shapes, wrong):
    # Reference: central finite differences of the forward (Nocedal & Wright 2006, 8.1); the slips
    # are written out beside each factory in no_oracle_layers.py, so the wrong tensors are known.
    report = check_self(f"{HERE}:{target}", shapes, cases=3)
    assert [c.status for c in report.cases] == ["failed"] * 3
    named = {f.split(" for ")[1].split(":")[0] for c in report.cases for f in c.findings}
    assert named == wrong


def test_an_input_changed_in_place_is_a_finding():
    report = check_self(f"{HERE}:in_place", [(3, 4)], cases=2)
    assert all("changed its input0 in place" in " ".join(c.findings) for c in report.cases)


def test_faults_are_verdicts():
    hang = check_self("tests/harness/torch_layers.py:hang", [(2, 3)], cases=1, timeout=2)
    assert hang.cases[0].status == "timeout"

    def broken():
        raise RuntimeError("no kernel for this shape")
    report = check_self(broken, [(2, 3)], cases=1)
    assert report.cases[0].status == "subject-error" and "no kernel for this shape" in report.cases[0].message


def test_a_case_replays_by_its_id():
    whole = check_self(f"{HERE}:gated_unit_slipped", [(2, 3, 4)], cases=3, seed=7)
    again = check_self(f"{HERE}:gated_unit_slipped", [(2, 3, 4)], case_ids=[whole.cases[2].case_id])
    assert [c.case_id for c in again.cases] == ["7-2"]
    assert again.cases[0].findings == whole.cases[2].findings
    assert whole.cases[2].replay.endswith("--input-shape 2,3,4 --case 7-2")


@pytest.mark.parametrize("shapes", [[], [()], [(2, 0)], [(2, -1)], None, [(2.5, 3)]])
def test_bad_input_shapes_are_refused(shapes):
    with pytest.raises(ValueError, match="input_shapes="):
        check_self(f"{HERE}:gated_unit", shapes)


def test_named_inputs_label_the_findings_and_the_replay():
    report = check_self(f"{HERE}:squared_distance_slipped", {"anchor": (3, 4), "sample": (3, 4)}, cases=1)
    assert any(" for sample:" in f for f in report.cases[0].findings)
    assert report.cases[0].replay.endswith("--input-shape anchor=3,4 --input-shape sample=3,4 --case 0-0")


def test_input_names_must_be_identifiers_and_free():
    with pytest.raises(ValueError, match="names are identifiers"):
        check_self(f"{HERE}:gated_unit", {"a.b": (2, 3)})
    with pytest.raises(ValueError, match="taken by the model's parameters"):  # GatedUnit has a and b
        check_self(f"{HERE}:gated_unit", {"a": (2, 3, 4)})
