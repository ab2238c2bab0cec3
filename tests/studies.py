"""Small studies for tests: a base study as a dictionary, with per-test overrides."""

from simlab.study.spec import parse_study


def study_with(base: dict, source: str = "test", **over):
    """Parse ``base`` after overrides: a dict updates that section, anything else replaces it."""
    data = dict(base)
    for key, value in over.items():
        data[key] = {**data[key], **value} if isinstance(value, dict) else value
    return parse_study(data, source=source)
