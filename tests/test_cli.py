"""The command line as a user runs it: exit codes, JSON, JUnit, pins, replay, the op listing."""
import json
import subprocess
import sys
import xml.etree.ElementTree as ET

import pytest

LAYERS = "tests/harness/torch_layers.py"


def refops(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "refops.cli", *args], capture_output=True, text=True,
                          timeout=300, cwd=cwd)


def test_passing_check_exits_0_and_writes_json_and_junit(tmp_path):
    run = refops("check", f"{LAYERS}:relu", "--op", "relu", "--cases", "8", "--json", str(tmp_path / "r.json"),
                 "--junit", str(tmp_path / "r.xml"), "--quiet")
    assert run.returncode == 0, run.stdout + run.stderr
    data = json.loads((tmp_path / "r.json").read_text())
    assert data["passed"] is True and data["cases"] == 8 and data["failures"] == []
    suite = ET.parse(tmp_path / "r.xml").getroot()
    assert suite.tag == "testsuite" and suite.get("tests") == "8" and suite.get("failures") == "0"
    assert "evidence, not proof" in run.stdout


def test_failing_check_exits_1_with_configs_and_a_replay_that_reproduces(tmp_path):
    run = refops("check", "refops.examples.denoiser:tile_conv_slipped", "--op", "conv2d", "--cases", "6",
                 "--set", "padding=same", "--set", "padding_mode=zeros", "--set", "stride=1", "--set", "kernel_size=2",
                 "--json", str(tmp_path / "r.json"))
    assert run.returncode == 1, run.stdout + run.stderr
    data = json.loads((tmp_path / "r.json").read_text())
    failure = data["failures"][0]
    assert failure["config"]["padding"] == "same" and failure["config"]["kernel_size"] in (2, [2, 2])
    assert any(t["tensor"] == "input" and t["violations"] > 0 for t in failure["tensors"])
    replay = failure["replay"].split()[2:]  # drop "refops check"
    again = refops("check", *replay, "--json", str(tmp_path / "one.json"))
    assert again.returncode == 1
    one = json.loads((tmp_path / "one.json").read_text())
    assert one["cases"] == 1 and one["failures"][0]["case_id"] == failure["case_id"]


@pytest.mark.parametrize("args, message", [
    (["check", "no.such.module:f", "--op", "relu"], "importing no.such.module failed"),
    (["check", f"{LAYERS}:relu", "--op", "rellu"], "no op of that name; did you mean relu"),
    (["check", f"{LAYERS}:relu", "--op", "relu", "--set", "kernel_size=3"], "has no parameter 'kernel_size'"),
    (["check", f"{LAYERS}:relu", "--op", "relu", "--set", "oops"], "expected NAME=VALUE"),
    (["check", f"{LAYERS}:relu", "--op", "relu", "--case", "x"], "expected SEED-INDEX"),
    (["check", f"{LAYERS}:relu", "--op", "relu", "--device", "cuda"], "no CUDA device"),
    (["check", f"{LAYERS}:relu", "--op", "relu", "--dtype", "float8"], "invalid choice"),
    (["check", f"{LAYERS}:relu", "--op", "relu", "--jobs", "0"], "--jobs '0': expected a whole number >= 1"),
    (["check", f"{LAYERS}:relu"], "give --op OP"),
    (["check", f"{LAYERS}:relu", "--op", "relu", "--input-shape", "2,3"], "--input-shape is for a check without --op"),
    (["check", f"{LAYERS}:relu", "--input-shape", "2,3", "--set", "x=1"], "--set: only with --op"),
    (["check", f"{LAYERS}:relu", "--input-shape", "2,3", "--dtype", "float16"], "--dtype: only with --op"),
    (["check", f"{LAYERS}:relu", "--input-shape", "2,x"], "expected positive comma-separated sizes"),
], ids=["bad-target", "unknown-op", "unknown-pin", "malformed-pin", "bad-case-id", "no-cuda", "bad-dtype",
        "bad-jobs", "no-op-no-shape", "op-and-shape", "pin-without-op", "half-without-op", "bad-shape"])
def test_unusable_commands_exit_2_with_a_message(args, message):
    run = refops(*args)
    assert run.returncode == 2
    assert message in run.stderr


def test_pins_are_read_as_json_or_plain_strings(tmp_path):
    run = refops("check", "refops.examples.denoiser:tile_conv", "--op", "conv2d", "--cases", "4",
                 "--set", "kernel_size=[1, 3]", "--set", "padding_mode=zeros", "--set", "bias=false",
                 "--json", str(tmp_path / "r.json"), "--html", str(tmp_path / "r.html"))
    assert run.returncode == 0, run.stdout + run.stderr
    assert "HTML report written to" in run.stdout and (tmp_path / "r.html").stat().st_size > 1000


def test_ops_listing_shows_formula_and_output_shape():
    run = refops("ops", "conv2d", "softmax")
    assert run.returncode == 0
    assert "conv2d(input, weight, bias=None; stride=1" in run.stdout
    assert "Output shape:" in run.stdout and "softmax(input; dim)" in run.stdout


def test_demo_passes_the_correct_layer_and_catches_the_slip(tmp_path):
    run = refops("demo", "--out", str(tmp_path / "demo"), "--quiet")
    assert run.returncode == 0, run.stdout + run.stderr
    assert "The correct layer passed and the slipped one was caught." in run.stdout
    correct, slipped = run.stdout.split("=== refops.examples.denoiser:tile_conv_slipped")
    assert "  PASSED" in correct and "  FAILED" in slipped and "input:" in slipped
    assert (tmp_path / "demo" / "tile_conv.html").exists() and (tmp_path / "demo" / "tile_conv_slipped.html").exists()


def test_shards_cover_the_unsharded_run_and_merge(tmp_path):
    common = ["check", "refops.examples.denoiser:tile_conv_slipped", "--op", "conv2d", "--cases", "9",
              "--set", "padding_mode=zeros", "--set", "padding=same", "--set", "stride=1", "--quiet"]
    refops(*common, "--json", str(tmp_path / "all.json"))
    for i in (1, 2, 3):
        refops(*common, "--shard", f"{i}/3", "--json", str(tmp_path / f"s{i}.json"))
    run = refops("merge", *(str(tmp_path / f"s{i}.json") for i in (1, 2, 3)), "-o", str(tmp_path / "m.json"))
    whole, merged = (json.loads((tmp_path / n).read_text()) for n in ("all.json", "m.json"))
    assert merged["cases"] == whole["cases"] == 9
    assert sorted(f["case_id"] for f in merged["failures"]) == sorted(f["case_id"] for f in whole["failures"])
    assert merged["passed"] is whole["passed"] is False and run.returncode == 1


def test_without_an_oracle_the_backward_is_checked_against_the_forward(tmp_path):
    right = refops("check", "tests/harness/no_oracle_layers.py:gated_unit", "--input-shape", "2,3,4", "--cases", "2",
                   "--json", str(tmp_path / "right.json"), "--quiet")
    assert right.returncode == 0, right.stdout + right.stderr
    assert "against finite differences of its own forward in float64" in right.stdout
    data = json.loads((tmp_path / "right.json").read_text())
    assert data["passed"] is True and data["cases"] == 2 and data["op"] is None
    slipped = refops("check", "tests/harness/no_oracle_layers.py:squared_distance_slipped", "--input-shape", "3,4",
                     "--input-shape", "3,4", "--cases", "2", "--junit", str(tmp_path / "s.xml"), "--quiet")
    assert slipped.returncode == 1 and "finite differences of its forward for input1" in slipped.stdout
    replay = [line.split("replay: ")[1] for line in slipped.stdout.splitlines() if "replay: " in line][0]
    again = refops(*replay.split()[1:])
    assert again.returncode == 1 and "1 cases (1 failed)" in again.stdout
    suite = ET.parse(tmp_path / "s.xml").getroot()
    assert suite.get("name") == "refops.no-oracle.float64" and suite.get("failures") == "2"
