"""Small studies for tests: a base study as a dictionary, with per-test overrides."""

from simlab.study.spec import parse_study


def study_with(base: dict, source: str = "test", **over):
    """Parse ``base`` after overrides: a dict updates that section, anything else replaces it."""
    data = dict(base)
    for key, value in over.items():
        data[key] = {**data[key], **value} if isinstance(value, dict) else value
    return parse_study(data, source=source)


def constrained(study, *, limit=True, fails=False):
    """`study` with a measured limit (viscosity below 40, on its own prior) and/or hidden failures (a
    fifth of the space), built on the types while the study file's [[limit]] reader does not exist.

    The traces of such a study must carry simlab.columns.LIMIT_COLUMNS; tests add them themselves."""
    import dataclasses

    from simlab.study.types import FailSpec, LimitSpec, Prior

    scale = tuple(float(w) / 4.0 for w in study.space.width)
    limits = (LimitSpec("viscosity", Prior("matern52", scale, 8.0, 30.0, 1.0), below=40.0),) if limit else ()
    world = dataclasses.replace(study.world, fails_where=FailSpec(share=0.2, lengthscale=scale)) if fails else study.world
    return dataclasses.replace(study, limits=limits, world=world)
