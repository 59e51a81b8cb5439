"""The cautions that go with every synthesized output, in one place.

Tags, STAC sidecars, model cards, reports and the demo quote these texts;
``../shared/DESIGN.md`` (Cautions) is their contract.
"""

__all__ = ["CAUTION", "SCORES_CAUTION"]

_NOT_A_MEASUREMENT = (
    "Magnified detail is synthesized by a statistical model. It is not a measurement: "
    "do not use it for measuring distances or areas, legal or property boundaries, damage "
    "or insurance evidence, or safety-critical decisions."
)

#: For outputs, tags, model cards and logs.
CAUTION = (
    f"{_NOT_A_MEASUREMENT} Defer to licensed practice (surveyors, photogrammetrists) and to "
    "the rules of your agency and local codes for derived imagery."
)

#: For assessment reports: what the scores do and do not say.
SCORES_CAUTION = (
    f"{_NOT_A_MEASUREMENT} These scores describe how well the synthesized detail matched one "
    "reference under one degradation model; they do not certify any other scene."
)
