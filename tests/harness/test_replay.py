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


def test_replay_refuses_a_tampered_bundle(tmp_path):
    bundle = record_model(MODEL, [(1, 1, 8, 8)], tmp_path / "b", dtype="float32")
    target = bundle / "input0.npy"
    data = bytearray(target.read_bytes())
    data[-1] ^= 1
    target.write_bytes(bytes(data))
    run = subprocess.run([sys.executable, "-m", "refops.cli", "replay", MODEL, str(bundle)],
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 2 and "input0.npy" in run.stderr
