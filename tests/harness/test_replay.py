"""Record a trusted run of the demo denoiser, replay it: the same model passes, the slipped one fails."""
import json
import subprocess
import sys

import numpy as np

from refops.harness.replay import record_model, replay_model

MODEL = "refops.examples.denoiser:denoiser"


def test_identical_backend_passes_and_the_slipped_port_fails(tmp_path):
    bundle = record_model(MODEL, [(2, 1, 10, 10)], tmp_path / "b", dtype="bfloat16", seed=1)
    same = replay_model(MODEL, bundle)
    assert same.passed and {c.tensor for c in same.cases[0].comparisons} >= {"output", "grad.input0",
                                                                           "grad.lift.weight"}
    slipped = replay_model("refops.examples.denoiser:denoiser_slipped", bundle)
    assert not slipped.passed
    failing = {c.tensor for c in slipped.cases[0].comparisons if not c.passed}
    assert "grad.input0" in failing and "output" not in failing  # the slip is in the backward only


def test_named_model_inputs_name_the_bundle_arrays(tmp_path):
    bundle = record_model(MODEL, {"tiles": (1, 1, 8, 8)}, tmp_path / "b", dtype="float32")
    assert (bundle / "tiles.npy").exists() and not (bundle / "input0.npy").exists()
    slipped = replay_model("refops.examples.denoiser:denoiser_slipped", bundle)
    assert "grad.tiles" in {c.tensor for c in slipped.cases[0].comparisons if not c.passed}


def test_a_bundle_of_the_previous_minor_version_still_replays(tmp_path):
    # The compatibility rule of refops.golden: a reader accepts every minor version of its major.
    bundle = record_model(MODEL, [(1, 1, 8, 8)], tmp_path / "b", dtype="float32")
    manifest = json.loads((bundle / "manifest.json").read_text())
    assert manifest["schema_version"] == "1.1"
    manifest["schema_version"] = "1.0"  # what refops wrote before layer bundles
    (bundle / "manifest.json").write_text(json.dumps(manifest))
    assert replay_model(MODEL, bundle).passed


def test_replay_refuses_a_tampered_bundle(tmp_path):
    bundle = record_model(MODEL, [(1, 1, 8, 8)], tmp_path / "b", dtype="float32")
    target = bundle / "input0.npy"
    data = bytearray(target.read_bytes())
    data[-1] ^= 1
    target.write_bytes(bytes(data))
    run = subprocess.run([sys.executable, "-m", "refops.cli", "replay", MODEL, str(bundle)],
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 2 and "input0.npy" in run.stderr


# Layer bundles: cases of an op's space recorded on a trusted layer, references from the oracle.
import pytest  # noqa: E402

import refops.examples.layers as layers  # noqa: E402
from refops.golden import BundleError, read_bundle  # noqa: E402
from refops.harness import check_layer  # noqa: E402
from refops.harness.replay import record_layer, replay, replay_layer  # noqa: E402

TORCH_CONV = "tests/harness/torch_layers.py:conv2d"
# Pins that make a defect's configuration occur (as in test_hand_written.py).
PINS = {"padding_on_the_high_side": {"padding": 1, "padding_mode": "zeros"},
        "dilation_ignored_when_strided": {"dilation": 2, "stride": 2}}


@pytest.mark.parametrize("dtype", ["float32", "bfloat16"])
def test_ports_replay_on_a_bundle_of_torchs_conv(tmp_path, dtype):
    # Reference: torch's nn.Conv2d as the trusted backend, refops's conv2d oracle (itself checked
    # against torch float64 autograd in tests/ops/test_conv.py) for the references.
    import torch_layers
    from refops.examples.denoiser import tile_conv
    bundle = record_layer(torch_layers.conv2d, "conv2d", tmp_path / "b", cases=10, seed=2, dtype=dtype)
    manifest = read_bundle(bundle).manifest
    cases = manifest["config"]["cases"]
    # The recorded cases are the ones `refops check` draws for the same seed.
    drawn = check_layer(torch_layers.conv2d, "conv2d", cases=10, seed=2, dtype=dtype, shrink=0)
    assert [c["case_id"] for c in cases] == [c.case_id for c in drawn.cases]
    assert all(c["drawn"]["kernel_size"] == list(np.atleast_1d(d.config["kernel_size"])) or
               c["drawn"]["kernel_size"] == d.config["kernel_size"] for c, d in zip(cases, drawn.cases))
    # Rounding shows: the trusted run used a visible share of the bound for the output.
    assert 0 < max(c["shares"]["output"] for c in cases) <= 1
    for port in (torch_layers.conv2d, tile_conv, layers.conv2d):
        report = replay(port, bundle)
        assert len(report.cases) == 10 and report.passed, port


@pytest.mark.parametrize("defect", sorted(set(layers.DEFECTS) - {"input_changed_in_place"}))
def test_each_conv_slip_fails_its_replay(tmp_path, defect):
    import torch_layers
    # Factories (not TARGET strings) run in this process: no worker to start per test.
    bundle = record_layer(torch_layers.conv2d, "conv2d", tmp_path / "b", cases=12, seed=4, pins=PINS.get(defect))
    assert read_bundle(bundle).manifest["config"]["target"] == "conv2d"
    report = replay_layer(getattr(layers, f"conv2d_{defect}"), bundle)
    assert not report.passed, defect


def test_the_slipped_tile_conv_fails_on_the_input_gradient_only(tmp_path):
    from refops.examples.denoiser import tile_conv, tile_conv_slipped
    pins = {"padding": "same", "stride": 1, "padding_mode": "zeros"}
    bundle = record_layer(tile_conv, "conv2d", tmp_path / "b", cases=10, pins=pins, dtype="bfloat16")
    assert replay(tile_conv, bundle).passed
    slipped = replay(tile_conv_slipped, bundle)
    failing = {c.tensor for case in slipped.failures for c in case.comparisons if not c.passed}
    assert failing == {"input"}
    assert all(c.config["padding"] == "same" for c in slipped.cases)


def test_a_tampered_layer_bundle_is_refused(tmp_path):
    bundle = record_layer(TORCH_CONV, "conv2d", tmp_path / "b", cases=2)
    target = bundle / "case.0-1.reference.weight.npy"
    target.write_bytes(target.read_bytes()[:-8])
    with pytest.raises(BundleError, match="case.0-1.reference.weight.npy"):
        replay(TORCH_CONV, bundle)


def test_record_and_replay_a_layer_from_the_command_line(tmp_path):
    cli = [sys.executable, "-m", "refops.cli"]
    record = subprocess.run(cli + ["record", TORCH_CONV, "--op", "conv2d", "--cases", "4", "--set", "groups=1",
                                   "-o", str(tmp_path / "b")], capture_output=True, text=True, timeout=120)
    assert record.returncode == 0, record.stderr
    assert all(c["drawn"]["groups"] == 1 for c in read_bundle(tmp_path / "b").manifest["config"]["cases"])
    good = subprocess.run(cli + ["replay", "refops.examples.layers:conv2d", str(tmp_path / "b")],
                          capture_output=True, text=True, timeout=120)
    assert good.returncode == 0 and "against the recorded trusted run of" in good.stdout
    bad = subprocess.run(cli + ["replay", "refops.examples.layers:conv2d_weight_gradient_scaled",
                                str(tmp_path / "b")], capture_output=True, text=True, timeout=120)
    assert bad.returncode == 1 and "grad of weight" in bad.stdout
    neither = subprocess.run(cli + ["record", TORCH_CONV, "-o", str(tmp_path / "c")], capture_output=True,
                             text=True, timeout=60)
    assert neither.returncode == 2 and "give --op OP" in neither.stderr
