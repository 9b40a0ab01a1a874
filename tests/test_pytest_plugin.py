"""The pytest plugin in a real pytest run (pytester): a passing and a failing subject, xdist."""
import pytest

pytest_plugins = ["pytester"]

TESTS = '''
def test_good(refops_check):
    report = refops_check("refops.examples.denoiser:tile_conv", "conv2d", pins={"padding_mode": "zeros"})
    assert len(report.cases) == 3

def test_slipped(refops_check):
    refops_check("refops.examples.denoiser:tile_conv_slipped", "conv2d",
                 pins={"padding": "same", "stride": 1, "padding_mode": "zeros", "kernel_size": 2})
'''


@pytest.mark.parametrize("extra", [[], ["-n", "2"]], ids=["plain", "xdist"])
def test_fixture_passes_and_fails_with_the_report(pytester, extra):
    pytester.makepyfile(test_subjects=TESTS)
    result = pytester.runpytest_subprocess("--refops-cases", "3", *extra)  # loaded by its entry point
    result.assert_outcomes(passed=1, failed=1)
    result.stdout.fnmatch_lines(["*FAILED case*", "*replay: refops check*tile_conv_slipped*", "*evidence, not proof*"])
