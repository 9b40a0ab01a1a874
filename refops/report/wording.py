"""Sentences every report carries, worded once."""

CAUTION = ("A passing check is evidence, not proof: refops compares against float64 references (its "
           "own oracles, a recorded trusted run, or finite differences) under an error model, on the "
           "cases it drew. Where a wrong result can hurt someone "
           "(medical, safety-critical or financial pipelines), your own validation and your field's "
           "standards govern.")


def config_text(config: dict) -> str:
    """``name=value`` pairs of a drawn configuration, in a stable order."""
    return ", ".join(f"{k}={v!r}" for k, v in sorted(config.items()))


def failing_comparisons(case) -> list:
    return [c for c in case.comparisons if not c.passed]
