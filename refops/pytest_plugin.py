"""pytest integration: the ``refops_check`` fixture and ``--refops-cases`` / ``--refops-seed``.

    def test_my_conv(refops_check):
        refops_check("mypkg.kernels:fused_conv", "conv2d", dtype="bfloat16")

The fixture runs :func:`refops.harness.check_layer` and fails the test with the text report as
its message. Each pytest-xdist worker runs its own tests' checks, so the plugin works under xdist.
"""
from __future__ import annotations

import pytest


def pytest_addoption(parser):
    group = parser.getgroup("refops")
    group.addoption("--refops-cases", type=int, default=None, help="cases per refops check (default: the call's)")
    group.addoption("--refops-seed", type=int, default=None, help="seed for refops checks (default: the call's)")


@pytest.fixture
def refops_check(request):
    """``refops_check(target, op, **options) -> Report``; fails the test when a case fails."""
    from refops.harness import check_layer

    def run(target, op, **options):
        config = request.config
        if config.getoption("--refops-cases") is not None:
            options["cases"] = config.getoption("--refops-cases")
        if config.getoption("--refops-seed") is not None:
            options["seed"] = config.getoption("--refops-seed")
        report = check_layer(target, op, **options)
        if not report.passed:
            from refops.report.text import render_text
            pytest.fail(render_text(report), pytrace=False)
        return report

    return run
