"""A sweep over several worker processes gives the verdicts of a sweep over one."""
import pytest

from refops.harness import check_layer

SLIPPED = "refops.examples.denoiser:tile_conv_slipped"
PINS = {"padding": "same", "padding_mode": "zeros", "stride": 1}


def verdicts(report):
    return [(c.case_id, c.status, [(t.tensor, t.violations, t.share_max) for t in c.comparisons])
            for c in report.cases]


def test_jobs_do_not_change_the_verdicts():
    # 40 cases: three batches of cases, so two workers run at once.
    one = check_layer(SLIPPED, "conv2d", cases=40, seed=4, pins=PINS, shrink=0)
    two = check_layer(SLIPPED, "conv2d", cases=40, seed=4, pins=PINS, shrink=0, jobs=2)
    assert verdicts(two) == verdicts(one)
    assert [c.case_id for c in one.cases] == [f"4-{i}" for i in range(40)]
    assert 0 < len(one.failures) < 40  # the slip shows on some configurations only


@pytest.mark.parametrize("jobs", [0, -1, 1.5, "2"])
def test_bad_jobs_are_refused(jobs):
    with pytest.raises(ValueError, match="jobs="):
        check_layer(SLIPPED, "conv2d", cases=2, jobs=jobs)


def test_more_than_one_job_needs_a_target_string():
    from refops.examples.denoiser import tile_conv
    with pytest.raises(ValueError, match="TARGET string"):
        check_layer(tile_conv, "conv2d", cases=2, jobs=2)
