"""Fixtures: the sample reports of :mod:`sample_reports`."""
import pytest

from . import sample_reports


@pytest.fixture
def failing_report():
    return sample_reports.failing_report()


@pytest.fixture
def passing_report():
    return sample_reports.passing_report()
